"""The sweep against the road graph, cross-checked against the curve-to-curve decision.

On a graph that is a single one-way chain Q, starting the sweep at Q's first vertex and
asking whether Q's last vertex is reachable at the last fix is exactly the Fréchet
decision between the trace P and Q, so the two independent code paths must agree.
"""

from __future__ import annotations

import numpy as np
import pytest
import shapely

from livematch import frechet_decide, frechet_distance
from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.sweep import (
    Node,
    StepContext,
    best_leaf,
    bridge_step,
    free_interval,
    pace,
    step_route,
    sweep_step,
)
from livematch.core.tracker import Tracker
from livematch.core.view import view_of


def chain(q: np.ndarray) -> RoadNetwork:
    return network_from_roads([Road([tuple(p) for p in q], way=1, oneway=True)])


def sweep_decides(p: np.ndarray, q: np.ndarray, eps: float) -> bool:
    """Fréchet decision between trace p and chain q computed by the graph sweep."""
    net = chain(q)
    view = view_of(net)
    eps2 = eps * eps
    first, last = 0, net.n_segments - 1
    ax, ay, bx, by = net.segment_coords(first)
    lo, hi = free_interval(ax, ay, bx, by, p[0, 0], p[0, 1], eps2)
    if lo > 0.0 or lo > hi:  # the start of q must be within eps of the start of p
        return False
    live = {first: Node(first, 1, 0.0, 0.0, ax, ay, None, (), 0.0, 0.0)}
    for i in range(1, len(p)):
        ctx = StepContext(view, eps, p[i - 1, 0], p[i - 1, 1], p[i, 0], p[i, 1], i + 1,
                          float(i), 0.0, 0.0, 0.0, 0.0)
        live = sweep_step(live, ctx)
        if not live:
            return False
    if last not in live:
        return False
    ax, ay, bx, by = net.segment_coords(last)
    return free_interval(ax, ay, bx, by, p[-1, 0], p[-1, 1], eps2)[1] >= 1.0


def random_pair(rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """A random road-like chain (no repeated points) and a noisy trace along it."""
    m = int(rng.integers(2, 9))
    steps = rng.normal(0.0, 40.0, size=(m - 1, 2)) + np.array([30.0, 0.0])
    q = np.vstack([[0.0, 0.0], np.cumsum(steps, axis=0)])
    n = int(rng.integers(2, 12))
    s = np.sort(rng.uniform(0, 1, n))
    s[0], s[-1] = 0.0, 1.0
    idx = s * (m - 1)
    k = np.minimum(idx.astype(int), m - 2)
    f = (idx - k)[:, None]
    p = q[k] * (1 - f) + q[k + 1] * f + rng.normal(0.0, 12.0, size=(n, 2))
    return p, q


@pytest.mark.parametrize("seed", range(60))
def test_sweep_on_chain_equals_frechet_decide(seed: int) -> None:
    """Graph sweep on a single chain == livematch.frechet_decide, for eps around the distance."""
    rng = np.random.default_rng(seed)
    p, q = random_pair(rng)
    d = frechet_distance(p, q)
    for eps in (d * 0.5, d * 0.97, d * 0.999, d * 1.001, d * 1.03, d * 2.0,
                float(rng.uniform(1.0, 80.0))):
        assert sweep_decides(p, q, eps) == frechet_decide(p, q, eps), (seed, eps, d)


def densify(curve: np.ndarray, step: float) -> np.ndarray:
    return np.asarray(shapely.segmentize(shapely.LineString(curve), step).coords)


@pytest.mark.parametrize("seed", range(15))
def test_sweep_on_chain_agrees_with_shapely_densified(seed: int) -> None:
    """Outside reference: shapely.frechet_distance (GEOS, discrete) on densified curves.

    The discrete Fréchet distance of curves densified to spacing h is at least the
    continuous one and at most the continuous one plus h (Eiter & Mannila 1994), so the
    sweep must say yes at GEOS's value and no below it minus h.
    """
    rng = np.random.default_rng(1000 + seed)
    p, q = random_pair(rng)
    h = 1.0
    dense = shapely.frechet_distance(shapely.LineString(densify(p, h)),
                                     shapely.LineString(densify(q, h)))
    assert sweep_decides(p, q, dense + 1e-9)
    assert not sweep_decides(p, q, dense - h - 1e-6)


def test_sweep_single_point_trace_on_chain() -> None:
    """Degenerate trace of one fix: decided by the distance to both ends of a point-like chain."""
    q = np.array([[0.0, 0.0], [10.0, 0.0]])
    p = np.array([[5.0, 0.0]])
    assert sweep_decides(p, q, 5.0) == frechet_decide(p, q, 5.0)
    assert sweep_decides(p, q, 4.9) == frechet_decide(p, q, 4.9)



def two_lanes() -> RoadNetwork:
    """Two parallel eastbound one-way roads 20 m apart, 300 m long, each of two segments.

    Segments 0, 1: the lower road (y = 0); segments 2, 3: the upper road (y = 20).
    """
    return network_from_roads([
        Road([(0.0, 0.0), (150.0, 0.0), (300.0, 0.0)], way=1, oneway=True),
        Road([(0.0, 20.0), (150.0, 20.0), (300.0, 20.0)], way=2, oneway=True),
    ])


def test_step_route_and_pace_on_straight_road() -> None:
    """Route of a step and the pace it predicts: 140 m in 4 s gives 350 m in the next 10 s."""
    view = view_of(two_lanes())
    root = Node(0, 1, 0.0, 0.2, 30.0, 0.0, None, (), 0.0, 0.0)  # 30 m along the road
    node = Node(1, 2, 4.0, 20.0 / 150.0, 170.0, 0.0, root, (), 0.0, 0.0)  # 170 m along
    assert step_route(view, root) == -1.0
    assert pace(view, root, 14.0) == -1.0
    # (1 - 0.2) * 150 + 20 = 140 m in 4 s
    assert step_route(view, node) == pytest.approx(140.0, abs=1e-9)
    assert pace(view, node, 14.0) == pytest.approx(350.0, abs=1e-9)
    # a roll back on one segment counts as standing still
    back = Node(0, 2, 4.0, 0.1, 15.0, 0.0, root, (), 0.0, 0.0)
    assert step_route(view, back) == pytest.approx(-15.0, abs=1e-9)
    assert pace(view, back, 14.0) == 0.0
    assert pace(view, node, 4.0) == -1.0  # no time has passed since the node


def test_bridge_step_pace_prefers_the_candidate_keeping_its_speed() -> None:
    """A fix between two lanes: the bridge picks the lane whose candidate kept its speed.

    Both candidates stand at x = 100 m, 10 s before the fix at (200, 10), which is as far
    from both lanes; the upper lane's candidate came 100 m in the 10 s before, the lower
    lane's 5 m, but its path so far cost 1 less. Their routes to the fix are the same,
    so the pace term, |100 - 5| / pace_m against the slow one, decides.
    """
    net = two_lanes()
    view = view_of(net)
    low, up = 0, 2
    assert net.segment_coords(low) == (0.0, 0.0, 150.0, 0.0)
    assert net.segment_coords(up) == (0.0, 20.0, 150.0, 20.0)
    slow0 = Node(low, 1, 0.0, 95.0 / 150.0, 95.0, 0.0, None, (), 1.0, 0.0)
    fast0 = Node(up, 1, 0.0, 0.0, 0.0, 20.0, None, (), 1.0, 0.0)
    slow = Node(low, 2, 10.0, 100.0 / 150.0, 100.0, 0.0, slow0, (), 1.0, 0.0)
    fast = Node(up, 2, 10.0, 100.0 / 150.0, 100.0, 20.0, fast0, (), 2.0, 0.0)
    live = {low: slow, up: fast}

    def bridged(pace_m: float) -> dict[int, Node]:
        ctx = StepContext.between(view, MatchSettings(pace_m=pace_m), 15.0,
                                  100.0, 10.0, 200.0, 10.0, 3, 20.0)
        return bridge_step(net, live, ctx, 400.0)

    with_pace = bridged(20.0)
    assert sorted(with_pace) == [1, 3]
    assert with_pace[1].parent is slow and with_pace[3].parent is fast
    assert with_pace[1].cost - with_pace[3].cost == pytest.approx(95.0 / 20.0 - 1.0, abs=1e-9)
    assert best_leaf(with_pace).seg == 3
    without = bridged(1e9)  # a pace term of 1e-7: the path so far decides
    assert without[3].cost - without[1].cost == pytest.approx(1.0, abs=1e-6)
    assert best_leaf(without).seg == 1


def test_bridge_step_street_turn_cost_charges_turns_in_the_street_only() -> None:
    """A U-turn at a shape point costs ``street_turn_cost`` more; one at a dead end does not.

    A two-way road (0, 0) - (300, 0) - (600, 0) - (2000, 0): x = 600 is a shape point, the
    ends are dead ends. A vehicle heading east at x = 450 that stood there (``stood``,
    ``stop_turns``) is next seen at x = 520 heading west: the westbound segment is reached
    only through a U-turn at the shape point (route 150 + 80 m; shapely's length of that
    polyline is the outside check). The eastbound candidate turns nowhere and pays
    nothing. At the west dead end (x = 0) the network has a U-turn: no extra charge.
    """
    net = network_from_roads([Road([(0.0, 0.0), (300.0, 0.0), (600.0, 0.0), (2000.0, 0.0)],
                                   way=9)])
    view = view_of(net)
    east, west = 2, 3
    assert net.segment_coords(east) == (300.0, 0.0, 600.0, 0.0)
    assert net.segment_coords(west) == (600.0, 0.0, 300.0, 0.0)
    assert not view.turn_back_ok[net.seg_to[east]] and view.turn_back_ok[net.seg_from[0]]
    before = Node(0, 1, 0.0, 1.0, 300.0, 0.0, None, (), 0.0, 0.0)
    here = Node(east, 2, 15.0, 0.5, 450.0, 0.0, before, (), 0.0, 0.0)

    def bridged(street_turn_cost: float, stood: bool, live: dict[int, Node], x1: float,
                x0: float = 450.0) -> dict[int, Node]:
        settings = MatchSettings(stop_turns=True, street_turn_cost=street_turn_cost)
        ctx = StepContext.between(view, settings, 15.0, x0, 2.0, x1, 2.0, 3, 30.0, stood)
        return bridge_step(net, live, ctx, 400.0)

    free = bridged(0.0, True, {east: here}, 520.0)
    charged = bridged(3.0, True, {east: here}, 520.0)
    assert sorted(free) == sorted(charged) == [east, west]
    assert free[west].parent is here and free[west].via == ()
    turn = shapely.LineString([(450.0, 0.0), (600.0, 0.0), (free[west].x, 0.0)]).length
    assert turn == pytest.approx(230.0, abs=1e-9)  # shapely's length of the driven route
    assert charged[west].cost - free[west].cost == pytest.approx(3.0, abs=1e-9)
    assert charged[east].cost == free[east].cost
    assert west not in bridged(0.0, False, {east: here}, 520.0)  # no stop: no turn there
    # heading west at x = 100, next seen at x = 60 heading east: the turn is at the dead
    # end x = 0, which the network allows, so street_turn_cost is not charged
    start = Node(1, 1, 0.0, 0.0, 300.0, 0.0, None, (), 0.0, 0.0)
    back = Node(1, 2, 15.0, 200.0 / 300.0, 100.0, 0.0, start, (), 0.0, 0.0)
    at_end = [bridged(c, False, {1: back}, 60.0, 100.0)[0].cost for c in (0.0, 3.0)]
    assert at_end[0] == at_end[1]


def test_tracker_pace_reach_follows_a_dead_end_driven_between_two_fixes() -> None:
    """At 30 s a vehicle drives into a dead end and half back out: the bridge routes it.

    A road west-east through J = (1500, 0) and a two-way dead-end spur north from J,
    400 m long. One fix every 30 s at 20-27 m/s east; then, from (1400, 0), the vehicle
    drives 100 m to J, up the spur to its end and 300 m back down: the fix at (1500, 100)
    is on the spur heading south, 800 m of road later. Its pace predicts those 800 m;
    the detour bound (2 x 141.4 + 150 m, plus twice the largest eps) stops every level's
    search short of them, so without ``pace_reach`` the fix is taken for an outlier and
    the committed path never comes back down the spur.
    """
    net = network_from_roads([Road([(0.0, 0.0), (1500.0, 0.0), (3000.0, 0.0)], way=1),
                              Road([(1500.0, 0.0), (1500.0, 400.0)], way=2)])
    north, south, east_after = 4, 5, 2
    assert net.segment_coords(north) == (1500.0, 0.0, 1500.0, 400.0)
    assert net.segment_coords(south) == (1500.0, 400.0, 1500.0, 0.0)
    assert net.segment_coords(east_after) == (1500.0, 0.0, 3000.0, 0.0)
    # the route driven between the fixes at 60 s and 90 s (shapely's length is the
    # outside check) against the detour bound of the largest level (eps 60 m)
    driven = shapely.LineString([(1400.0, 0.0), (1500.0, 0.0), (1500.0, 400.0),
                                 (1500.0, 100.0)]).length
    assert driven == pytest.approx(800.0, abs=1e-9)
    settings = MatchSettings()
    bound = (settings.detour_factor * shapely.Point(1400.0, 0.0).distance(
        shapely.Point(1500.0, 100.0)) + settings.gap_m + 2.0 * max(settings.eps_levels))
    assert bound < 700.0 < driven  # the part of the spur within eps of the fix is beyond
    fixes = [(0.0, 0.0), (600.0, 0.0), (1400.0, 0.0), (1500.0, 100.0), (2300.0, 0.0),
             (2900.0, 0.0)]

    def final(**kw: bool) -> tuple[dict[float, tuple[int, float]], list[int]]:
        tracker = Tracker(net, "v1", MatchSettings(**kw))
        events = []
        for k, (x, y) in enumerate(fixes):
            events += tracker.update(Fix("v1", 1_000_000.0 + 30.0 * k, 0.0, 0.0, x, y, None))
        events += tracker.flush()
        commits = [e for e in events if isinstance(e, Commit)]
        answers = {f.t - 1_000_000.0: (f.segment, f.offset_m) for c in commits for f in c.fixes}
        return answers, [s for c in commits for s in c.path]

    answers, path = final()
    assert answers[90.0] == (south, pytest.approx(300.0, abs=1e-6))
    assert path == [0, north, south, east_after]
    answers, path = final(pace_reach=False)
    # no route reaches the fix's road in the time: the spike test (30 s apart) drops it
    # as an outlier and its answer is interpolated on the main road; no way back south
    assert answers[90.0][0] == east_after
    assert south not in path
