"""bench/oracle.py's finer class of a route-mismatch episode (``episode_class``) and the
table of ``--summary`` (``summary``), on small hand-drawn networks.

The outside references: which segments touch (a shared vertex) and which vertex is a
dead end are read off the drawn coordinates here, not from the network's arrays; the
summary's metres and shares are checked against Python's ``math.fsum`` of the episodes.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.network import RoadNetwork
from tests.catalogue import dead_end, grid, seg_of
from tests.test_sim_oracle import bench_oracle


def _street_with_lane() -> RoadNetwork:
    """A residential street y=0 (way 1, 0..200 m, nodes every 100 m), a service lane
    y=8 beside it (way 2, 20..180 m, touching nothing) and a second residential street
    y=-40 (way 3, 0..200 m, touching nothing)."""
    return network_from_roads([
        Road([(0.0, 0.0), (100.0, 0.0), (200.0, 0.0)], way=1, highway="residential"),
        Road([(20.0, 8.0), (180.0, 8.0)], way=2, highway="service"),
        Road([(0.0, -40.0), (200.0, -40.0)], way=3, highway="residential"),
    ])


def _fix_episode(final: int, true_seg: int, cause: str = "fix_other") -> dict[str, Any]:
    """One episode over gap 4 (fixes 4 and 5), fix 5 wrong: answered ``final``, truly on
    ``true_seg``."""
    return {"cause": cause, "gaps": [4], "b": 5, "wrong": [5], "final": [true_seg, final],
            "true_seg": [true_seg, true_seg], "added_m": 10.0, "missed_m": 5.0,
            "added": [], "missed": []}


def test_wrong_answer_next_across_a_junction() -> None:
    """Truly on (0,0)->(100,0), answered on (100,0)->(200,0): they share the node at
    x=100, so the episode is a junction one."""
    oracle = bench_oracle()
    net = _street_with_lane()
    true_seg = seg_of(net, (0.0, 0.0), (100.0, 0.0))
    answered = seg_of(net, (100.0, 0.0), (200.0, 0.0))
    ep = _fix_episode(answered, true_seg)
    assert oracle.episode_class(net, ep) == "fix_other/junction"
    assert oracle.episode_class(net, {**ep, "cause": "fix_forced"}) == "fix_forced/junction"


def test_wrong_answer_on_a_lane_or_another_street() -> None:
    """Answered on the service lane 8 m beside the street (no shared node): service;
    answered on the other residential street: road; the same fix right: not a fix
    class at all is asked, so a right fix never decides it (road)."""
    oracle = bench_oracle()
    net = _street_with_lane()
    true_seg = seg_of(net, (0.0, 0.0), (100.0, 0.0))
    lane = seg_of(net, (20.0, 8.0), (180.0, 8.0))
    other = seg_of(net, (0.0, -40.0), (200.0, -40.0))
    assert oracle.episode_class(net, _fix_episode(lane, true_seg)) == "fix_other/service"
    assert oracle.episode_class(net, _fix_episode(other, true_seg)) == "fix_other/road"
    right = {**_fix_episode(lane, true_seg), "wrong": []}
    assert oracle.episode_class(net, right) == "fix_other/road"


def test_laps_into_a_dead_end_or_round_a_block() -> None:
    """Missed metres on the cul-de-sac's last segment, into its end at (500, 300) (a
    node no road leaves but back): dead end; on the segment before it, and round a
    grid block (every node has four roads): ring."""
    oracle = bench_oracle()
    net = dead_end()
    into_end = seg_of(net, (500.0, 250.0), (500.0, 300.0))
    before = seg_of(net, (500.0, 200.0), (500.0, 250.0))
    ep = {"cause": "laps", "added_m": 0.0, "missed_m": 100.0, "added": []}
    assert oracle.episode_class(net, {**ep, "missed": [before, into_end]}) == "laps/dead_end"
    assert oracle.episode_class(net, {**ep, "missed": [before]}) == "laps/ring"
    g = grid(3, 100.0, 100.0)
    block = [seg_of(g, (100.0, 100.0), (200.0, 100.0)),
             seg_of(g, (200.0, 100.0), (200.0, 200.0))]
    assert oracle.episode_class(g, {**ep, "missed": block}) == "laps/ring"
    assert oracle.episode_class(g, {**ep, "cause": "break", "missed": block}) == "break"


def test_summary_adds_up() -> None:
    """The classes' metres add up to every episode's added + missed metres (math.fsum),
    the shares to 1, largest class first, with its episodes counted."""
    oracle = bench_oracle()
    net = _street_with_lane()
    true_seg = seg_of(net, (0.0, 0.0), (100.0, 0.0))
    lane = seg_of(net, (20.0, 8.0), (180.0, 8.0))
    eps = [_fix_episode(lane, true_seg), _fix_episode(lane, true_seg),
           {"cause": "end", "added_m": 3.5, "missed_m": 40.0},
           {"cause": "bridge_other", "added_m": 1.25, "missed_m": 0.0}]
    rows = oracle.summary(net, eps)
    assert [r["class"] for r in rows] == ["end", "fix_other/service", "bridge_other"]
    assert [r["episodes"] for r in rows] == [1, 2, 1]
    total = math.fsum(e["added_m"] + e["missed_m"] for e in eps)
    # metres are rounded to 0.1 m per class
    assert math.isclose(math.fsum(r["metres"] for r in rows), total, abs_tol=0.05 * len(rows))
    assert math.isclose(math.fsum(r["share"] for r in rows), 1.0, abs_tol=1e-3)
    assert rows[1]["largest_m"] == 15.0


def test_fix_episodes_by_fleetmiss_cause() -> None:
    """With a bench/fleetmiss.py dump, a fix_* episode takes the cause most of its wrong
    fixes have there, only from the dump's own cell; other causes keep their class; a
    wrong fix the dump does not hold is ``?``."""
    oracle = bench_oracle()
    net = _street_with_lane()
    dump = [
        {"cell": ["trips", 31, "helsinki", 1], "vehicle": "v", "cause": "junction",
         "fixes": [{"i": 5, "miss": True}, {"i": 6, "miss": True}, {"i": 7, "miss": False}]},
        {"cell": ["trips", 31, "helsinki", 1], "vehicle": "v", "cause": "outlier",
         "fixes": [{"i": 9, "miss": True}]},
        {"cell": ["trips", 77, "helsinki", 1], "vehicle": "v", "cause": "end",
         "fixes": [{"i": 9, "miss": True}, {"i": 10, "miss": True}]},
    ]
    misses = oracle.fleetmiss_causes(dump, ["trips", 31, "helsinki", 1])
    assert misses == {("v", 5): "junction", ("v", 6): "junction", ("v", 9): "outlier"}
    ep = {"vehicle": "v", "cause": "fix_other", "wrong": [5, 6, 9], "added_m": 1.0,
          "missed_m": 0.0}
    assert oracle.episode_class(net, ep, misses) == "fix:junction"
    assert oracle.episode_class(net, {**ep, "wrong": [10]}, misses) == "fix:?"
    assert oracle.episode_class(net, {**ep, "cause": "end"}, misses) == "end"


def test_laps_into_a_stub_shorter_than_the_gnss_error() -> None:
    """A 10 m two-way stub (6 m + 4 m, as the Helsinki one of Session 14) off a street:
    its spur length is the stub's drawn length (shapely), so missed laps into it are
    ``laps/stub``; a 40 m one drawn the same way is ``laps/dead_end``; the summary names
    the stub's way as the one holding the class's metres."""
    oracle = bench_oracle()
    stub = [(100.0, 0.0), (100.0, 6.0), (100.0, 10.0)]
    longer = [(300.0, 0.0), (300.0, 20.0), (300.0, 40.0)]
    net = network_from_roads([
        Road([(0.0, 0.0), (100.0, 0.0), (200.0, 0.0), (300.0, 0.0), (400.0, 0.0)], way=1),
        Road(stub, way=7), Road(longer, way=8)])
    leaving = np.bincount(net.seg_from, minlength=len(net.node_xy))
    into = seg_of(net, (100.0, 6.0), (100.0, 10.0))
    assert math.isclose(oracle._spur_m(net, into, leaving), shapely.LineString(stub).length)
    ep = {"cause": "laps", "added_m": 0.0, "missed_m": 20.0, "added": [],
          "missed": [seg_of(net, (100.0, 0.0), (100.0, 6.0)), into,
                     seg_of(net, (100.0, 10.0), (100.0, 6.0)),
                     seg_of(net, (100.0, 6.0), (100.0, 0.0))]}
    assert oracle.episode_class(net, ep) == "laps/stub"
    far = {**ep, "missed": [seg_of(net, (300.0, 20.0), (300.0, 40.0))]}
    assert oracle.episode_class(net, far) == "laps/dead_end"
    rows = oracle.summary(net, [ep, far])
    assert rows[0]["class"] == "laps/stub" and rows[0]["top_way"] == [7, 20.0]
