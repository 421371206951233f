"""``speed_laps``: laps of a small loop that the fixes cannot show, put into the committed
path from the fixes' reported speeds; and the simulator's reported speed.

Outside checks: ``networkx`` (its Dijkstra on a line graph built here) for the shortest
lap :func:`livematch.core.routing.small_loop` finds; ``shapely`` for the committed path
(each segment's line starts where the one before ends, and the path's ``length`` is
compared with the distance truly driven); numpy for the simulator's true speed (the
distance between consecutive 1 Hz truth points).

The scenes are invented: a 300 m two-way street ending at a one-way turning ring 19.2 m
round (a hexagon of radius 3.2 m, about 6 m across, narrower than the GNSS error), which
a vehicle circles a few times between fixes 5 s apart before driving back out; and a
street with a 10 m two-way dead-end stub at a junction that a vehicle drives in and out
of again and again (the shape that half of the random walk's lost laps at Helsinki 5 s
come from, docs/measured.md "Session 14 (rmfwalk)").
"""

from __future__ import annotations

import itertools
import math

import networkx as nx
import numpy as np
import pytest
from shapely.geometry import LineString

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.routing import small_loop
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.core.view import view_of
from livematch.sim.drive import DriveSettings, observe, simulate_drive
from livematch.sim.logs import replay_records

RADIUS = 3.2
SIDES = 6
RING = [(0.0, 0.0)] + [(RADIUS - RADIUS * math.cos(2 * math.pi * k / SIDES),
                        RADIUS * math.sin(2 * math.pi * k / SIDES))
                       for k in range(1, SIDES)] + [(0.0, 0.0)]
ROADS = [Road([(-300.0, 0.0), (-150.0, 0.0), (0.0, 0.0)], way=1),
         Road(RING, way=2, oneway=True)]
CIRC = sum(math.dist(RING[i], RING[i + 1]) for i in range(SIDES))
T0 = 1_767_225_600.0


STUB_ROADS = [Road([(-300.0, 0.0), (-150.0, 0.0), (0.0, 0.0), (150.0, 0.0), (300.0, 0.0)],
                   way=1),
              Road([(0.0, 0.0), (0.0, 10.0)], way=2)]
STUB = [(0.0, 0.0), (0.0, 10.0), (0.0, 0.0)]


def _along(pts: list[tuple[float, float]], s: float) -> tuple[float, float]:
    """The point ``s`` metres along the closed lap ``pts`` (taken round and round)."""
    s %= sum(math.dist(pts[i], pts[i + 1]) for i in range(len(pts) - 1))
    for i in range(len(pts) - 1):
        length = math.dist(pts[i], pts[i + 1])
        if s <= length:
            f = s / length
            return (pts[i][0] + f * (pts[i + 1][0] - pts[i][0]),
                    pts[i][1] + f * (pts[i + 1][1] - pts[i][1]))
        s -= length
    return pts[0]


def ring_drive(laps: int, seed: int, interval: int = 5, stand_s: float = 0.0,
               v_road: float = 8.0, v_ring: float = 3.0,
               lap: list[tuple[float, float]] = RING, out_x: float = -300.0,
               ) -> tuple[list[tuple[float, float, float, float]], float]:
    """Fixes (t, x, y, reported speed) every ``interval`` s of a drive in along the
    street from x = -300, ``laps`` laps of ``lap`` (or a stand of ``stand_s`` at its
    junction), and out to x = ``out_x``; and the distance truly driven (m). GNSS error:
    first-order Gauss-Markov, sigma 5 m per axis, tau 45 s (as the bench's drives);
    reported speed: the true speed plus 0.2 m/s white error, clipped at 0."""
    rng = np.random.default_rng(seed)
    circ = sum(math.dist(lap[i], lap[i + 1]) for i in range(len(lap) - 1))
    t_in = 300.0 / v_road
    t_ring = laps * circ / v_ring
    total = 2 * t_in + t_ring + stand_s
    n = int(total)
    phi = math.exp(-1.0 / 45.0)
    err = np.zeros((n, 2))
    err[0] = rng.normal(0.0, 5.0, 2)
    for k in range(1, n):
        err[k] = phi * err[k - 1] + math.sqrt(1 - phi * phi) * rng.normal(0.0, 5.0, 2)
    out = []
    for k in range(0, n, interval):
        t = float(k)
        if t < t_in:
            (x, y), v = (-300.0 + t * v_road, 0.0), v_road
        elif t < t_in + t_ring:
            (x, y), v = _along(lap, (t - t_in) * v_ring), v_ring
        elif t < t_in + t_ring + stand_s:
            (x, y), v = (0.0, 0.0), 0.0
        else:
            (x, y), v = (math.copysign((t - t_in - t_ring - stand_s) * v_road, out_x),
                         0.0), v_road
        speed = max(0.0, v + float(rng.normal(0.0, 0.2)))
        out.append((t, x + float(err[k, 0]), y + float(err[k, 1]), speed))
    return out, 600.0 + laps * circ


def committed_path(net: RoadNetwork, fixes: list[tuple[float, float, float, float]],
                   on: bool, speeds: bool = True) -> list[int]:
    tracker = Tracker(net, "v1", MatchSettings(speed_laps=on))
    path: list[int] = []
    for t, x, y, v in fixes:
        for ev in tracker.update(Fix("v1", T0 + t, 0.0, 0.0, x, y, 7.5,
                                     v if speeds else None)):
            if isinstance(ev, Commit):
                path.extend(ev.path)
    for ev in tracker.flush():
        if isinstance(ev, Commit):
            path.extend(ev.path)
    return path


def ring_m(net: RoadNetwork, path: list[int]) -> float:
    return float(sum(net.seg_len[s] for s in path if net.source_ids(s)[0] == 2))


def test_small_loop_is_the_shortest_lap_by_networkx() -> None:
    """On an invented network of a ring, a two-way square block, a street and a dead-end
    stub, for every vertex and several radii and length bounds: small_loop's lap length
    equals the shortest closed drive inside the disc found by networkx's Dijkstra on the
    line graph (segment -> segment, no segment followed by its twin but at a dead end)."""
    roads = [*ROADS,
             Road([(0.0, 0.0), (0.0, 40.0), (40.0, 40.0), (40.0, 0.0), (0.0, 0.0)], way=3),
             Road([(40.0, 0.0), (90.0, 0.0)], way=4),
             Road([(40.0, 40.0), (48.0, 46.0)], way=5)]
    net = network_from_roads(roads)
    view = view_of(net)
    xy = net.node_xy
    for centre, radius in (((0.0, 0.0), 10.0), ((3.0, 0.0), 8.0), ((20.0, 20.0), 30.0),
                           ((20.0, 20.0), 15.0), ((0.0, 0.0), 60.0)):
        inside = {v for v in range(net.n_vertices)
                  if math.dist(tuple(xy[v]), centre) <= radius}
        graph = nx.DiGraph()
        for s in range(net.n_segments):
            if view.sf[s] in inside and view.st[s] in inside:
                ways = view.out[view.st[s]]
                for s2 in ways:
                    if (s2 != view.twin[s] or len(ways) == 1) and view.st[s2] in inside:
                        graph.add_edge(s, s2, weight=view.slen[s2])
        for v in inside:
            best = math.inf
            for s in view.out[v]:
                if view.st[s] not in inside or s not in graph:
                    continue
                lengths = nx.single_source_dijkstra_path_length(graph, s)
                for e, d in lengths.items():
                    if view.st[e] == v and (e != s or view.st[s] == v):
                        best = min(best, view.slen[s] + d if e != s else view.slen[s])
            for limit in (25.0, 100.0, 500.0):
                got = small_loop(view, v, limit, centre, radius)
                want = best if best <= limit else None
                assert (None if got is None else pytest.approx(got[1])) == want, (v, limit)
                if got is not None:
                    lap = got[0]
                    assert view.sf[lap[0]] == v and view.st[lap[-1]] == v
                    assert all(view.st[p] == view.sf[q] and (
                        q != view.twin[p] or len(view.out[view.st[p]]) == 1)
                               for p, q in itertools.pairwise(lap))


def test_laps_put_back_from_reported_speeds() -> None:
    """Five laps of the ring at 5 s (more than half a lap per fix): the committed path
    without the rule keeps at most two of them; with it, at least one more a drive on
    average over four drives, never more laps than were driven; it stays connected (each
    segment's shapely line starts where the one before ends) and its length (shapely)
    is closer to the distance truly driven."""
    net = network_from_roads(ROADS)
    xy = net.node_xy
    gained = 0.0
    for seed in range(4):
        fixes, driven = ring_drive(5, seed)
        off = committed_path(net, fixes, False)
        on = committed_path(net, fixes, True)
        assert ring_m(net, off) <= 2 * CIRC + 1e-6
        assert ring_m(net, on) <= 5 * CIRC + 1e-6
        gained += ring_m(net, on) - ring_m(net, off)
        lines = [LineString([tuple(xy[net.seg_from[s]]), tuple(xy[net.seg_to[s]])])
                 for s in on]
        assert all(p.coords[-1] == q.coords[0] for p, q in itertools.pairwise(lines))
        lens = [sum(LineString([tuple(xy[net.seg_from[s]]), tuple(xy[net.seg_to[s]])]).length
                    for s in p) for p in (off, on)]
        assert abs(lens[1] - driven) < abs(lens[0] - driven)
    assert gained >= 4 * CIRC - 1e-6  # measured: 6 laps over the four drives


def test_laps_of_a_dead_end_stub() -> None:
    """In and out of a 10 m dead-end stub six times at 5 s, then on along the street:
    with the rule the committed path drives the stub at least once more a drive on
    average, never more than six times, and stays connected (each segment's shapely
    line starts where the one before ends)."""
    net = network_from_roads(STUB_ROADS)
    xy = net.node_xy
    gained = 0.0
    for seed in range(4):
        fixes, _ = ring_drive(6, seed, lap=STUB, out_x=300.0)
        off = committed_path(net, fixes, False)
        on = committed_path(net, fixes, True)
        assert ring_m(net, on) <= 6 * 20.0 + 1e-6
        gained += ring_m(net, on) - ring_m(net, off)
        lines = [LineString([tuple(xy[net.seg_from[s]]), tuple(xy[net.seg_to[s]])])
                 for s in on]
        assert all(p.coords[-1] == q.coords[0] for p, q in itertools.pairwise(lines))
    assert gained >= 4 * 20.0 - 1e-6  # measured: 6 laps over the four drives


def test_no_speeds_no_change() -> None:
    """Fixes without a reported speed: the path is the rule-off path, laps or none."""
    net = network_from_roads(ROADS)
    for laps in (0, 5):
        fixes, _ = ring_drive(laps, 1)
        assert committed_path(net, fixes, True, speeds=False) == committed_path(
            net, fixes, False)


def test_stand_and_plain_drive_get_no_laps() -> None:
    """A minute's stand at the ring's junction (speeds about 0) and a drive in and out
    with no lap: the same path as without the rule."""
    net = network_from_roads(ROADS)
    for seed in range(3):
        for fixes, _ in (ring_drive(0, seed, stand_s=60.0), ring_drive(0, seed)):
            assert committed_path(net, fixes, True) == committed_path(net, fixes, False)


def test_checkpoint_mid_ring_continues_the_same() -> None:
    """Serialised and restored while circling, a tracker with the rule gives the same
    events as one that never stopped (the speeds and the CUSUM go with the state)."""
    net = network_from_roads(ROADS)
    fixes, _ = ring_drive(5, 2)
    settings = MatchSettings(speed_laps=True)
    whole = Tracker(net, "v1", settings)
    part = Tracker(net, "v1", settings)
    a: list = []
    b: list = []
    for i, (t, x, y, v) in enumerate(fixes):
        fix = Fix("v1", T0 + t, 0.0, 0.0, x, y, 7.5, v)
        a.extend(whole.update(fix))
        b.extend(part.update(fix))
        if i in (9, 11, 13):
            part = Tracker.from_bytes(net, settings, part.to_bytes())
    a.extend(whole.flush())
    b.extend(part.flush())
    assert a == b
    assert any(isinstance(e, Commit) and ring_m(net, list(e.path)) > 2 * CIRC for e in a)


def test_validation() -> None:
    assert ("speed_laps", "must be true or false, got 'yes'") in MatchSettings(
        speed_laps="yes").problems()  # type: ignore[arg-type]
    assert MatchSettings(speed_laps=True).problems() == []


def test_simulated_speed_is_the_true_speed_and_leaves_the_drive_alone() -> None:
    """DriveSettings.speed_sigma_mps: the drive (truth, GNSS error, outliers) is the same
    with or without it; with 0 m/s error the reported speed is the distance between the
    1 Hz truth points around that second (numpy), and the replay log carries it."""
    net = network_from_roads([Road([(0.0, 0.0), (400.0, 0.0), (400.0, 400.0)], way=1)])
    plain = simulate_drive(net, np.random.default_rng(5), "v", T0,
                           DriveSettings(duration_s=60.0))
    sped = simulate_drive(net, np.random.default_rng(5), "v", T0,
                          DriveSettings(duration_s=60.0, speed_sigma_mps=0.0))
    assert plain.truth == sped.truth and plain.speed is None
    np.testing.assert_array_equal(plain.error_xy, sped.error_xy)
    np.testing.assert_array_equal(plain.outlier_xy, sped.outlier_xy)
    assert sped.speed is not None
    pos = np.array([p.path_pos_m for p in sped.truth])
    for i in range(1, len(pos) - 1):
        assert sped.speed[i] == pytest.approx((pos[i + 1] - pos[i - 1]) / 2.0, abs=0.006)
    obs = observe(sped, 5)
    assert [o.speed for o in obs] == [float(sped.speed[o.truth_index]) for o in obs]
    assert all(o.speed is None for o in observe(plain, 5))
    rec = replay_records(net, [(sped, obs)])
    assert [r["payload"]["speed"] for r in rec] == [o.speed for o in obs]
    assert "speed" not in replay_records(net, [(plain, observe(plain, 5))])[0]["payload"]
    with pytest.raises(ValueError, match="speed_sigma_mps"):
        DriveSettings(speed_sigma_mps=-1.0)


def test_sparse_fixes_get_no_laps() -> None:
    """Fixes 15 s apart (more than gap_s): the sum starts afresh at every step, so the
    path is the rule-off path even where the vehicle circled the ring."""
    net = network_from_roads(ROADS)
    for seed in range(3):
        fixes, _ = ring_drive(8, seed, interval=15)
        assert committed_path(net, fixes, True) == committed_path(net, fixes, False)
