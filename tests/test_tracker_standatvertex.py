"""A committed stand just past a vertex is reported at the vertex (stand_at_vertex),
through Tracker.update and Tracker.flush, checked with shapely's distances."""

from __future__ import annotations

import itertools
import math
from dataclasses import replace

import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit, Event, MatchedFix
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node
from livematch.core.tracker import Tracker
from livematch.errors import BadConfigError
from livematch.pipeline import matcher_settings_from_mapping

shapely = pytest.importorskip("shapely")

ON = MatchSettings(stand_at_vertex=True)

# A two-way road west-east with a shape point every 10 m (plain points in the middle of a
# road). A van drives east at 10 m/s to the shape point at x = 200 (fix 17) and stands
# there for 40 s while the GNSS error leans east, along the road, by up to 4 m (a slow,
# correlated drift) and wanders by about half a metre from one fix to the next (invented
# data shaped like the simulator's Gauss-Markov error): the best path follows it onto
# the segment 200 -> 210, which the van never drives.
V = 200.0
STAND = range(18, 58)  # fix indices of the stand
APPROACH = [(30.0 + 10.0 * i, 1.0) for i in range(18)]
LEAN = [(V + min(4.0, 0.3 * i) + 0.4 * math.sin(1.7 * i), 1.0 + 0.4 * math.cos(1.3 * i))
        for i in range(1, 41)]


def _network() -> RoadNetwork:
    return network_from_roads([Road([(float(x), 0.0) for x in range(0, 410, 10)], way=7)])


def _settled(settings: MatchSettings, fixes: list[tuple[float, float]],
             step: int = 1) -> tuple[list[MatchedFix], list[int]]:
    """Every fix's final answer, in time order, and the committed path (fixes ``step``
    seconds apart)."""
    tracker = Tracker(_network(), "van9", settings)
    events: list[Event] = []
    for i, (x, y) in enumerate(fixes):
        events += tracker.update(Fix("van9", float(step * i), 0.0, 0.0, x, y, 5.0))
    events += tracker.flush()
    commits = [e for e in events if isinstance(e, Commit)]
    settled = sorted((f for c in commits for f in c.fixes), key=lambda f: f.t)
    return settled, [s for c in commits for s in c.path]


def _line(net: RoadNetwork, seg: int) -> shapely.LineString:
    a, b = net.node_xy[net.seg_from[seg]], net.node_xy[net.seg_to[seg]]
    return shapely.LineString([(float(a[0]), float(a[1])), (float(b[0]), float(b[1]))])


def test_a_stand_at_the_end_of_the_log_is_reported_at_the_vertex() -> None:
    """The log ends while the van stands (the flush commits it). Without the rule the
    stand's later fixes are committed on 200 -> 210, beyond the vertex; with it
    every fix of the stand is reported at x = 200 as the end of the segment 190 -> 200
    (shapely: the point lies on that segment's line, at its end), each within eps (15 m)
    of its fix (shapely's Point.distance), and the committed path is the same."""
    net = _network()
    fixes = APPROACH + LEAN
    old, old_path = _settled(MatchSettings(stand_at_vertex=False), fixes)
    new, new_path = _settled(ON, fixes)
    assert [f.t for f in old] == [f.t for f in new] == [float(i) for i in range(len(fixes))]
    assert new_path == old_path
    past = [f for f in old[STAND.start:] if float(net.node_xy[net.seg_from[f.segment], 0]) >= V]
    assert len(past) >= 10  # the old rule committed the stand on road beyond V
    for f, (x, y) in zip(new[STAND.start:], LEAN, strict=True):
        seg = _line(net, f.segment)
        assert seg.coords[-1] == pytest.approx((V, 0.0))
        assert f.offset_m == pytest.approx(seg.length)
        assert shapely.Point(f.x, f.y).distance(seg) == pytest.approx(0.0, abs=1e-9)
        assert shapely.Point(x, y).distance(shapely.Point(f.x, f.y)) <= 15.0
    # the approach keeps its answers
    assert new[:STAND.start - 1] == old[:STAND.start - 1]


def test_reported_points_keep_the_certificate() -> None:
    """Each fix is within eps of its reported point and the reported points run forward
    along the road, so the fixes and the reported points (each fix to its own point) lie
    within Fréchet distance eps: shapely's frechet_distance (a discrete distance over the
    densified curves) of the two polylines is at most 15 m."""
    fixes = APPROACH + LEAN
    new, _ = _settled(ON, fixes)
    xs = [f.x for f in new]
    assert all(b >= a - 1e-9 for a, b in itertools.pairwise(xs))
    answered = shapely.LineString([(f.x, f.y) for f in new])
    # densify 0.1: GEOS's discrete Fréchet took minutes at 0.05-0.07
    assert shapely.frechet_distance(shapely.LineString(fixes), answered, densify=0.1) <= 15.0


def test_a_van_that_drives_on_keeps_the_road_it_drove() -> None:
    """The van stands, then drives on east: the path (unchanged by the rule) goes on
    through x = 200, the stand is reported at the vertex on the segment before it (on the
    road driven either way), and the fixes after the stand keep their answers."""
    net = _network()
    fixes = APPROACH + LEAN + [(V + 4.0 + 10.0 * i, 1.0) for i in range(1, 16)]
    old, old_path = _settled(MatchSettings(stand_at_vertex=False), fixes)
    new, new_path = _settled(ON, fixes)
    assert new_path == old_path
    after = STAND.stop + 2
    assert new[after:] == old[after:]
    moved = [f for f in new[STAND.start:STAND.stop] if f.x == V]
    assert len(moved) >= 10
    for f in moved:
        assert _line(net, f.segment).coords[-1] == pytest.approx((V, 0.0))


def test_no_stand_no_change() -> None:
    """A van that drives through at 10 m/s (and one that stands only 6 s) gets the same
    final answers with and without the rule: the rule needs fixes near the vertex for
    at least 10 s."""
    through = [(30.0 + 10.0 * i, 1.0) for i in range(35)]
    short = APPROACH + LEAN[:6] + [(V + 3.0 + 10.0 * i, 1.0) for i in range(1, 15)]
    for fixes in (through, short):
        old = _settled(MatchSettings(stand_at_vertex=False), fixes)
        assert _settled(ON, fixes) == old


def test_the_key_is_validated() -> None:
    """stand_at_vertex is a boolean in [matcher]; anything else is refused by name."""
    assert matcher_settings_from_mapping({"stand_at_vertex": False},
                                         "a.toml").stand_at_vertex is False
    assert [k for k, _ in replace(MatchSettings(), stand_at_vertex=1).problems()] == [
        "stand_at_vertex"]
    with pytest.raises(BadConfigError, match=r"matcher\.stand_at_vertex"):
        matcher_settings_from_mapping({"stand_at_vertex": "yes"}, "a.toml")


def test_a_stand_nearer_the_next_vertex_stays_where_it_was() -> None:
    """A van that stands 8 m past the shape point at x = 200 (2 m short of the one at
    x = 210) is not moved back to x = 200: it is nearer the far end of its segment, where
    it may have stood; the answers are the same with and without the rule, and each lies
    within 3 m of x = 208 (shapely's Point.distance)."""
    fixes = APPROACH[:-1] + [(198.0, 1.0)] + [(208.0, 1.0)] * 30
    old = _settled(MatchSettings(stand_at_vertex=False), fixes)
    new = _settled(ON, fixes)
    assert new == old
    for f in new[0][len(APPROACH) + 1:]:
        assert shapely.Point(f.x, f.y).distance(shapely.Point(208.0, 0.0)) <= 3.0


def _segment_at(net: RoadNetwork, f: MatchedFix) -> tuple[float, float]:
    """The (from x, to x) of the segment a final answer is on."""
    return (float(net.node_xy[net.seg_from[f.segment], 0]),
            float(net.node_xy[net.seg_to[f.segment], 0]))


def test_a_van_that_holds_still_keeps_its_answers() -> None:
    """Noise-free fixes (the receiver repeats its position): a van that stands on the
    vertex at x = 200 for 20 s and then drives off east, and one that stands 3 m past
    it to the end of the log. The fixes do not move, so they show no drift the path
    could have followed: the answers are the same with and without the rule, and every
    final answer lies within 2 m of its fix (shapely's Point.distance; the tolerance of
    tests/test_tracker_osm.py's noise-free drives). The drive-off's first fixes (0.4-10
    m past the vertex, like the simulator's 3 m/s/s start) would otherwise be in the
    stand's run and be reported at the vertex."""
    approach = [(30.0 + 10.0 * i, 0.0) for i in range(17)]
    off = [(V + d, 0.0) for d in (0.36, 2.16, 5.46, 10.26, 16.5, 24.0, 33.0, 43.0, 53.0)]
    at_v = approach + [(V, 0.0)] * 20 + off
    past_v = approach + [(V, 0.0), (V + 3.0, 0.0)] + [(V + 3.0, 0.0)] * 25
    for fixes in (at_v, past_v):
        old = _settled(MatchSettings(stand_at_vertex=False), fixes)
        new = _settled(ON, fixes)
        assert new == old
        for f, (x, y) in zip(new[0], fixes, strict=True):
            assert shapely.Point(f.x, f.y).distance(shapely.Point(x, y)) < 2.0


def test_sparse_fixes_are_left_alone() -> None:
    """The same leaning stand, 90 s long, sampled every 15 s (the van slowing to x = 190
    first): a run of 10 s is then one or two fixes, too few to tell a stand from a slow
    step, and the rule does not act (the answers equal those without the rule);
    sampled every 5 s it does (the stand's fixes are reported at x = 200)."""
    net = _network()
    for step, approach, acts in ((15, [50.0, 190.0], False),
                                 (5, [50.0, 100.0, 150.0, 190.0], True)):
        stand = [(V + min(4.0, 0.3 * i) + 0.4 * math.sin(1.7 * i),
                  1.0 + 0.4 * math.cos(1.3 * i)) for i in range(step, 91, step)]
        fixes = [(x, 1.0) for x in approach] + stand
        # end_at_vertex (on by default) reports this stand at the end of a sparse log at
        # the vertex too: left out, so that the test sees stand_at_vertex alone
        old = _settled(MatchSettings(stand_at_vertex=False, end_at_vertex=False), fixes, step)
        new = _settled(MatchSettings(stand_at_vertex=True, end_at_vertex=False), fixes, step)
        assert len(new[0]) == len(fixes)
        moved = [f for f in new[0] if f.x == V and _segment_at(net, f) == (190.0, V)]
        assert (new != old) is acts
        assert (len(moved) >= 3) is acts


def test_a_van_that_starts_standing_at_a_vertex_is_not_put_on_a_road_it_never_drove() -> None:
    """A van switched on while standing at the vertex x = 200 (its first fix 1 m west
    of it, the next ones leaning east and wandering), which then drives off east: the
    stretch begins on the segment 190 -> 200, which the van never drove, so the stand is
    not reported as that segment's end; no final answer after the first lies on it."""
    net = _network()
    fixes = [(V - 1.0, 1.0)] + LEAN[:20] + [(V + 4.0 + 10.0 * i, 1.0) for i in range(1, 16)]
    new, _ = _settled(ON, fixes)
    assert all(_segment_at(net, f) != (190.0, V) for f in new[1:])



def test_a_loop_out_of_the_vertex_keeps_the_stand_where_it_was() -> None:
    """A committed path that comes to the vertex V = (0, 0) from the west, runs round a
    10 m block out of V and back (V -> (10, 0) -> (10, 10) -> (0, 10) -> V) and then
    matches 12 s of wandering fixes on the road south of V: the segment the loop came
    back by, (0, 10) -> V, is one a vehicle standing at V may never have driven (seen
    in the bench's random walk and routed trips: a loop that stand_loops left), so
    the stand keeps its answers on the road south; without the loop (the path coming
    straight from the west) the same stand is reported at V as the end of (-10, 0) -> V.
    Hand-built path nodes over fixes fed to the tracker (the fix buffer the rule reads);
    the segment ends are checked against the coordinates given to network_from_roads."""
    net = network_from_roads([Road([(-10.0, 0.0), (0.0, 0.0)], way=1),
                              Road([(0.0, 0.0), (10.0, 0.0), (10.0, 10.0), (0.0, 10.0),
                                    (0.0, 0.0)], way=2),
                              Road([(0.0, 0.0), (0.0, -40.0)], way=3)])

    def seg(a: tuple[float, float], b: tuple[float, float]) -> int:
        for s in range(net.n_segments):
            if (tuple(net.node_xy[net.seg_from[s]]) == a
                    and tuple(net.node_xy[net.seg_to[s]]) == b):
                return s
        raise AssertionError((a, b))

    west, south = seg((-10.0, 0.0), (0.0, 0.0)), seg((0.0, 0.0), (0.0, -40.0))
    loop = (seg((0.0, 0.0), (10.0, 0.0)), seg((10.0, 0.0), (10.0, 10.0)),
            seg((10.0, 10.0), (0.0, 10.0)))
    back = seg((0.0, 10.0), (0.0, 0.0))
    tracker = Tracker(net, "van9", ON)
    wander = [(-2.0, 0.5)] + [(0.6 * math.sin(1.7 * i), -1.5 + 0.6 * math.cos(1.3 * i))
                              for i in range(1, 14)]
    for i, (x, y) in enumerate(wander):
        tracker.update(Fix("van9", float(i), 0.0, 0.0, x, y, 5.0))
    seq0 = tracker.fix_seq0
    assert tracker.fix_n == len(wander)

    def node(s: int, i: int, pos: float, via: tuple[int, ...] = ()) -> Node:
        return Node(s, seq0 + i, float(i), pos, 0.0, 0.0, None, via, 0.0, 0.0)

    def answers(first: list[Node]) -> list[MatchedFix]:
        run = [node(south, i, 0.05)
               for i in range(len(first), len(wander))]
        chain = first + run
        fixes = [MatchedFix(n.t, n.seg, n.pos * float(net.seg_len[n.seg]), n.x, n.y)
                 for n in chain]
        before = Node(west, seq0 - 1, -1.0, 0.5, 0.0, 0.0, None, (), 0.0, 0.0)
        tracker._stand_at_vertex(chain, before, True, False, 15.0, fixes)
        return fixes

    looped = answers([node(west, 0, 0.8), node(back, 1, 0.5, loop)])
    assert all(f.segment == south for f in looped[2:])
    straight = answers([node(west, 0, 0.8)])
    assert all(f.segment == west and (f.x, f.y) == (0.0, 0.0) for f in straight[1:])
