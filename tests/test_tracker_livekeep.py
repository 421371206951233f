"""``live_keep``: the live answer stays on its segment unless another candidate beats it.

Plain data: two straight two-way roads 10 m apart, not connected (way 1 along y = 0,
way 2 along y = 10, shape points every 50 m), and fixes every second, 10 m apart, 2 m
off way 1. One fix drawn onto way 2 (a lean of the GNSS error towards the road
alongside) flips the plain live answer to way 2 for that fix; with the rule the answer
stays on way 1. Distances to the roads are checked with shapely (an outside
reference), the kept answer's certificate with shapely's ``frechet_distance`` (discrete
Fréchet distance, so the curves are densified to 0.5 m steps by ``segmentize`` and the
bound widened by the step).
"""

from __future__ import annotations

from shapely import LineString, Point, frechet_distance, segmentize

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Assignment, Commit, Event
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from tests.catalogue import dead_end, fixes_along

DENSIFY_M = 0.5
ROAD_A = [(float(x), 0.0) for x in range(0, 1001, 50)]
ROAD_B = [(float(x), 10.0) for x in range(0, 1001, 50)]
LEAN = 20  # the fix drawn onto way 2


def _roads() -> RoadNetwork:
    return network_from_roads([Road(ROAD_A, way=1), Road(ROAD_B, way=2)])


def _fixes(ys: list[float]) -> list[Fix]:
    return fixes_along([(100.0 + 10.0 * i, y) for i, y in enumerate(ys)])


def _run(net: RoadNetwork, fixes: list[Fix], keep: float) -> list[Event]:
    tracker = Tracker(net, "v1", MatchSettings(live_keep=keep))
    events: list[Event] = []
    for f in fixes:
        events.extend(tracker.update(f))
    return events + tracker.flush()


def _live_ways(net: RoadNetwork, events: list[Event]) -> list[int]:
    return [int(net.seg_way[e.segment]) for e in events if isinstance(e, Assignment)]


def _final(events: list[Event]) -> list[tuple[float, int, float]]:
    return [(m.t, m.segment, m.offset_m) for e in events if isinstance(e, Commit)
            for m in e.fixes]


def test_a_one_fix_lean_no_longer_flips_the_live_answer() -> None:
    net = _roads()
    fixes = _fixes([2.0] * LEAN + [10.0] + [2.0] * 15)
    lean = Point(fixes[LEAN].x, fixes[LEAN].y)
    # shapely: the leaning fix lies on way 2 and 10 m from way 1, so nearest-road snapping
    # and the plain ranking take way 2 there; every other fix is 2 m from way 1
    assert LineString(ROAD_B).distance(lean) == 0.0
    assert LineString(ROAD_A).distance(lean) == 10.0
    plain = _run(net, fixes, 0.0)
    kept = _run(net, fixes, 3.0)
    assert _live_ways(net, plain)[LEAN] == 2  # the flip the rule is for
    assert _live_ways(net, kept) == [1] * len(fixes)
    # only the live answer changes: final answers and commits are the same
    assert _final(kept) == _final(plain)
    assert [e for e in kept if isinstance(e, Commit)] == [e for e in plain if isinstance(e, Commit)]


def test_the_kept_answer_carries_a_valid_certificate() -> None:
    net = _roads()
    fixes = _fixes([2.0] * LEAN + [10.0] + [2.0] * 15)
    answers = [e for e in _run(net, fixes, 3.0) if isinstance(e, Assignment)]
    a = answers[LEAN]
    fix = fixes[LEAN]
    assert int(net.seg_way[a.segment]) == 1
    # the kept point lies within eps of its fix (shapely distance)
    assert Point(a.x, a.y).distance(Point(fix.x, fix.y)) <= a.eps_m
    # the window's fixes lie within Fréchet distance eps of way 1 from the first window
    # fix's foot to the kept point (shapely frechet_distance on densified curves)
    window = fixes[LEAN + 1 - a.window_fixes:LEAN + 1]
    assert len(window) == a.window_fixes >= 2
    curve = LineString([(f.x, f.y) for f in window])
    road = LineString([(window[0].x, 0.0), (a.x, a.y)])
    assert frechet_distance(segmentize(curve, DENSIFY_M), segmentize(road, DENSIFY_M)) \
        <= a.eps_m + DENSIFY_M


def test_evidence_still_moves_the_answer_within_a_segment() -> None:
    """The fixes move onto way 2 for good: even with a margin no candidate can overcome,
    the answer follows once the vehicle has left the segment it was on (segments here are
    50 m, 5 fixes), as the plain ranking does a fix or two earlier."""
    net = _roads()
    fixes = _fixes([2.0] * LEAN + [10.0] * 30)
    plain = _live_ways(net, _run(net, fixes, 0.0))
    stuck = _live_ways(net, _run(net, fixes, 1000.0))
    assert plain[LEAN:] == [2] * 30
    first = stuck.index(2)
    assert LEAN <= first <= LEAN + 5
    assert stuck[first:] == [2] * (len(fixes) - first)


def test_a_turn_round_is_not_held_back() -> None:
    """Up a 300 m cul-de-sac and back (fixes 2 m off its centre line): a candidate on the
    reverse of the last answer's segment is never out-ranked by the rule, so even with a
    margin no candidate can overcome the answer turns round at the same fix as without it
    (held back, it said "northbound" a fix after the turn)."""
    net = dead_end()
    ys = list(range(10, 301, 10)) + list(range(290, 0, -10))
    fixes = fixes_along([(502.0, float(y)) for y in ys])

    def headings(keep: float) -> str:
        out = []
        for e in _run(net, fixes, keep):
            if isinstance(e, Assignment):
                a, b = net.seg_from[e.segment], net.seg_to[e.segment]
                out.append("N" if net.node_xy[b][1] > net.node_xy[a][1] else "S")
        return "".join(out)

    plain = headings(0.0)
    assert plain == "N" * 31 + "S" * 28  # the end is fix 29 (y = 300); "S" from fix 31
    assert headings(1000.0) == plain


def test_off_is_the_plain_ranking() -> None:
    """0 disables the rule: the flip comes back (the same events as the defaults, which
    leave it off)."""
    net = _roads()
    fixes = _fixes([2.0] * LEAN + [10.0] + [2.0] * 15)
    off = _run(net, fixes, 0.0)
    tracker = Tracker(net, "v1")
    default: list[Event] = []
    for f in fixes:
        default.extend(tracker.update(f))
    default += tracker.flush()
    assert MatchSettings().live_keep == 0.0
    assert off == default


def test_restore_mid_trip_continues_identically() -> None:
    """The rule reads only the last answer's segment, which is part of the state."""
    net = _roads()
    fixes = _fixes([2.0] * LEAN + [10.0] + [2.0] * 15)
    settings = MatchSettings(live_keep=3.0)
    expected = _run(net, fixes, 3.0)
    first = Tracker(net, "v1", settings)
    head: list[Event] = []
    for f in fixes[:LEAN]:
        head.extend(first.update(f))
    for compress in (False, True):
        again = Tracker.from_bytes(net, settings, first.to_bytes(compress=compress))
        rest: list[Event] = []
        for f in fixes[LEAN:]:
            rest.extend(again.update(f))
        assert head + rest + again.flush() == expected


def test_negative_margin_is_refused() -> None:
    assert ("live_keep" in dict(MatchSettings(live_keep=-1.0).problems()))
    assert not MatchSettings(live_keep=15.0).problems()
