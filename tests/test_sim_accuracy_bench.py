"""The drive-model diagnostics of bench/accuracy.py: dead ends, drive mix, route-mismatch parts."""

from __future__ import annotations

from types import ModuleType

import networkx as nx
import numpy as np
import pytest

from livematch.sim.drive import DriveSettings, drivable_segments, simulate_drive
from livematch.sim.score import route_mismatch_fraction
from tests.catalogue import bench_module, dead_end, grid

T0 = 1_767_225_600.0


def bench_accuracy() -> ModuleType:
    """``bench/accuracy.py`` as a module."""
    return bench_module("accuracy")


def test_dead_ends_are_the_pendant_vertices_of_a_two_way_network():
    """On a network of two-way roads the dead ends are the vertices of degree 1 of the
    undirected graph (graph theory's pendant vertices; outside check: networkx degree)."""
    acc = bench_accuracy()
    net = dead_end()
    graph = nx.Graph(zip(net.seg_from.tolist(), net.seg_to.tolist(), strict=True))
    pendant = {v for v, deg in graph.degree() if deg == 1}
    assert acc.dead_ends(net, drivable_segments(net)) == pendant
    assert sorted(map(tuple, net.node_xy[sorted(pendant)].tolist())) == [
        (0.0, 0.0), (500.0, 300.0), (1000.0, 0.0)]


def test_drive_mix_counts_walk_turn_rounds_at_dead_ends_and_trip_dwells():
    """The walk turns round only at dead ends (every turn-round is a dead-end visit and
    none is at a dwell); trips turn round only at dwells and record their lengths."""
    acc = bench_accuracy()
    net = dead_end()
    allowed = drivable_segments(net)
    walks = [simulate_drive(net, np.random.default_rng(i), f"w{i}", T0,
                            DriveSettings(duration_s=600.0), allowed) for i in range(4)]
    mix = acc.drive_mix(net, walks, allowed)
    assert mix["uturns_per_h"] > 0 and mix["uturns_per_h"] == mix["dead_end_visits_per_h"]
    assert mix["uturns_at_dwell_per_h"] == 0 and mix["trips"] == 0
    assert mix["hours"] == pytest.approx(4 * 600 / 3600, abs=1e-3)
    assert mix["class_share"] == {"road": 1.0}  # the catalogue's default class
    trips = [simulate_drive(net, np.random.default_rng(i), f"t{i}", T0,
                            DriveSettings(duration_s=600.0, trips=True), allowed)
             for i in range(4)]
    mix = acc.drive_mix(net, trips, allowed)
    assert mix["uturns_per_h"] == 0 and mix["uturns_at_dwell_per_h"] > 0
    assert mix["trips"] > 0 and mix["trip_mean_m"] >= 500.0 and mix["still_share"] > 0.1


def test_rmf_parts_add_up_to_the_route_mismatch_fraction():
    """Added plus missed metres are the numerator of Newson & Krumm's route mismatch
    fraction; a road driven the wrong way counts in both and in wrong_dir twice."""
    acc = bench_accuracy()
    net = grid()
    true_path = tuple(int(s) for s in
                      simulate_drive(net, np.random.default_rng(2), "v", T0,
                                     DriveSettings(duration_s=300.0)).path)
    wrong = [int(net.seg_twin[true_path[3]]) if i == 3 else s
             for i, s in enumerate(true_path)]
    parts = acc.rmf_parts(net, true_path, wrong)
    length = float(sum(net.seg_len[s] for s in true_path))
    assert parts["added"] + parts["missed"] == pytest.approx(
        route_mismatch_fraction(true_path, wrong, net.seg_len) * length)
    seg = float(net.seg_len[true_path[3]])
    # this drive drives segment 3 once and never its twin, so the swap is one wrong way
    assert true_path.count(true_path[3]) == 1 and net.seg_twin[true_path[3]] not in true_path
    assert parts["added"] == parts["missed"] == parts["wrong_dir"] / 2 == seg
    perfect = acc.rmf_parts(net, true_path, list(true_path))
    assert perfect["added"] == perfect["missed"] == 0.0
