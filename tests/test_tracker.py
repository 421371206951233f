"""The per-vehicle tracker: ladder, certificate, commits, filters, state round trip."""

from __future__ import annotations

import itertools
import math
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Assignment, Commit, Filtered
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.errors import BadStateError
from tests.catalogue import dead_end, fixes_along, grid, oneway_pair, polyline_points, straight_road


def run(tracker: Tracker, fixes: list[Fix], flush: bool = True) -> list:
    events = []
    for f in fixes:
        events.extend(tracker.update(f))
    if flush:
        events.extend(tracker.flush())
    return events


def assignments(events: list) -> list[Assignment]:
    return [e for e in events if isinstance(e, Assignment)]


def commits(events: list) -> list[Commit]:
    return [e for e in events if isinstance(e, Commit)]


def committed_path(events: list) -> list[int]:
    return [s for c in commits(events) for s in c.path]


def assert_connected(net: RoadNetwork, path: list[int]) -> None:
    for a, b in itertools.pairwise(path):
        assert net.seg_to[a] == net.seg_from[b], f"path breaks between {a} and {b}"


def ways(net: RoadNetwork, segs: list[int]) -> list[int]:
    out: list[int] = []
    for s in segs:
        w = int(net.seg_way[s])
        if not out or out[-1] != w:
            out.append(w)
    return out


# east on Row 1 (way 3), then north on Col 3 (way 8)
ROUTE = [(0.0, 200.0), (600.0, 200.0), (600.0, 800.0)]


def test_tracker_noise_free_matched_exactly_at_smallest_level() -> None:
    """Fixes exactly on the roads: every one matched at the smallest eps in one window, onto
    itself (or, just past a junction, held at it while the branch is open)."""
    net = grid()
    fixes = fixes_along(polyline_points(ROUTE, 9.0))
    events = run(Tracker(net, "v1"), fixes)
    asg = assignments(events)
    assert len(asg) == len(fixes)
    held = 0
    for i, (a, f) in enumerate(zip(asg, fixes, strict=True)):
        assert a.eps_m == 15.0
        assert a.window_fixes == i + 1
        gap = math.hypot(a.x - f.x, a.y - f.y)
        if gap > 1e-6:  # just past a junction the answer may wait at it (junction_hold)
            held += 1
            assert a.offset_m == net.seg_len[a.segment] and gap <= 15.0
    assert held <= 3
    exact = run(Tracker(net, "v1", MatchSettings(junction_hold=0.0)), fixes)
    for a, f in zip(assignments(exact), fixes, strict=True):
        assert math.hypot(a.x - f.x, a.y - f.y) < 1e-6
    committed = [m for c in commits(events) for m in c.fixes]
    assert [m.t for m in committed] == [f.t for f in fixes]
    for m, f in zip(committed, fixes, strict=True):
        assert math.hypot(m.x - f.x, m.y - f.y) < 1e-6
    path = committed_path(events)
    assert_connected(net, path)
    assert ways(net, path)[-2:] == [3, 8]


def test_tracker_certificate_window_seconds() -> None:
    """window_s is the time spanned by the certified window."""
    net = straight_road()
    fixes = fixes_along([(x, 2.0) for x in range(0, 300, 10)], dt=2.0)
    asg = assignments(run(Tracker(net, "v1"), fixes))
    assert [a.window_s for a in asg] == [2.0 * i for i in range(len(fixes))]


def test_tracker_leaving_network_kills_small_levels_and_restarts() -> None:
    """A detour far from every road kills the small levels; back on the road they restart."""
    net = straight_road(2000.0)
    pts = [(x, 0.0) for x in range(0, 400, 10)]
    pts += [(400.0, y) for y in range(10, 301, 10)]       # 300 m north, off the network
    pts += [(400.0, y) for y in range(290, -1, -10)]      # and back
    pts += [(x, 0.0) for x in range(410, 800, 10)]
    fixes = fixes_along(pts)
    events = run(Tracker(net, "v1"), fixes)
    by_t = {e.t: e for e in events if isinstance(e, Assignment | Filtered)}
    off = [by_t[f.t] for f in fixes if f.y > 60.0]
    assert off and all(isinstance(e, Filtered) and e.reason == "no_road_nearby" for e in off)
    mid = [by_t[f.t] for f in fixes if 15.0 < f.y <= 30.0]
    assert all(isinstance(e, Assignment) and e.eps_m == 30.0 for e in mid)
    back = [by_t[f.t] for f in fixes if f.y == 0.0 and f.x > 400.0]
    assert all(isinstance(e, Assignment) and e.eps_m == 15.0 for e in back)
    # the 15 m window restarted on the way back rather than spanning the detour
    assert back[-1].window_fixes < len(back) + 10


def test_tracker_oneway_never_driven_backwards() -> None:
    """Between a one-way pair the westbound trace is matched to the westbound road only."""
    net = oneway_pair(gap=20.0)
    # 8 m from the westbound road (way 2, y=20), 12 m from the eastbound one (way 1, y=0)
    fixes = fixes_along([(x, 12.0) for x in range(950, 49, -10)])
    events = run(Tracker(net, "v1"), fixes)
    asg = assignments(events)
    assert all(int(net.seg_way[a.segment]) == 2 for a in asg[3:])
    committed = [m for c in commits(events) for m in c.fixes]
    assert len(committed) == len(fixes)
    assert all(int(net.seg_way[m.segment]) == 2 for m in committed)
    path = committed_path(events)
    assert_connected(net, path)
    for s in path:  # every westbound segment really goes west
        assert net.node_xy[net.seg_to[s], 0] < net.node_xy[net.seg_from[s], 0]


def test_tracker_uturn_at_dead_end_inside_one_window() -> None:
    """Up a cul-de-sac and back: the U-turn at its end keeps the smallest window alive."""
    net = dead_end()
    route = [(300.0, 0.0), (500.0, 0.0), (500.0, 300.0), (500.0, 0.0), (800.0, 0.0)]
    fixes = fixes_along(polyline_points(route, 10.0))
    events = run(Tracker(net, "v1"), fixes)
    asg = assignments(events)
    assert [a.window_fixes for a in asg] == list(range(1, len(fixes) + 1))
    path = committed_path(events)
    assert_connected(net, path)
    assert ways(net, path) == [1, 2, 1]
    spur = [s for s in path if int(net.seg_way[s]) == 2]
    north = [s for s in spur if net.node_xy[net.seg_to[s], 1] > net.node_xy[net.seg_from[s], 1]]
    assert len(north) == 6 and len(spur) == 12  # 300 m up in 50 m segments, and back


def test_tracker_uturn_mid_segment_restarts_small_level() -> None:
    """A U-turn in the middle of a segment: the small window dies and the match turns around."""
    net = straight_road(1000.0, step=100.0)
    pts = [(float(x), 0.0) for x in range(0, 351, 10)]
    pts += [(float(x), 0.0) for x in range(340, 0, -10)]
    fixes = fixes_along(pts)
    asg = assignments(run(Tracker(net, "v1"), fixes))
    westbound = [net.node_xy[net.seg_to[a.segment], 0] < net.node_xy[net.seg_from[a.segment], 0]
                 for a in asg]
    assert not any(westbound[:30])
    assert all(westbound[-20:])
    assert any(b.window_fixes < a.window_fixes for a, b in itertools.pairwise(asg))


def noisy_drive(seed: int, n_legs: int = 8) -> tuple[RoadNetwork, list[Fix]]:
    net = grid(6)
    rng = np.random.default_rng(seed)
    corners = [(0.0, 0.0)]
    for _ in range(n_legs):
        x, y = corners[-1]
        choices = [(x + 200, y), (x - 200, y), (x, y + 200), (x, y - 200)]
        choices = [c for c in choices if 0 <= c[0] <= 1000 and 0 <= c[1] <= 1000
                   and (len(corners) < 2 or c != corners[-2])]
        corners.append(choices[rng.integers(len(choices))])
    pts = polyline_points(corners, 10.0)
    noise = rng.normal(0.0, 3.0, size=(len(pts), 2))
    return net, fixes_along([(x + dx, y + dy) for (x, y), (dx, dy) in zip(pts, noise, strict=True)])


@pytest.mark.parametrize("compress", [False, True])
@pytest.mark.parametrize("cut", [1, 7, 40, 95])
def test_tracker_restore_mid_trip_gives_identical_outputs(cut: int, compress: bool) -> None:
    """Serialise after `cut` fixes (either encoding), restore, continue: the events equal
    an uninterrupted run."""
    net, fixes = noisy_drive(seed=cut)
    settings = MatchSettings(max_lag_fixes=20)
    straight = Tracker(net, "v1", settings)
    whole = run(straight, fixes)
    first = Tracker(net, "v1", settings)
    before = run(first, fixes[:cut], flush=False)
    blob = first.to_bytes(compress=compress)
    assert blob[:5] == b"LMT6" + (b"\x01" if compress else b"\x00")
    restored = Tracker.from_bytes(net, settings, blob)
    assert restored.to_bytes() == first.to_bytes()
    after = run(restored, fixes[cut:])
    assert before + after == whole
    assert restored.to_bytes() == straight.to_bytes()


def test_tracker_state_rejects_foreign_bytes() -> None:
    """Restoring garbage or another network's state is a clear BadStateError."""
    net = straight_road()
    with pytest.raises(BadStateError):
        Tracker.from_bytes(net, None, b"nonsense")
    blob = Tracker(grid(), "v1").to_bytes()
    with pytest.raises(BadStateError):
        Tracker.from_bytes(net, None, blob)


def test_tracker_state_stays_bounded_on_long_trip() -> None:
    """Hours of driving back and forth keep the serialised state small (forced commits)."""
    net = straight_road(2000.0)
    rng = np.random.default_rng(3)
    pts = []
    for lap in range(10):
        xs = np.arange(0.0, 2000.0, 8.0)
        pts += [(x, 0.0) for x in (xs if lap % 2 == 0 else xs[::-1])]
    fixes = fixes_along([(x + rng.normal(0, 4), y + rng.normal(0, 4)) for x, y in pts])
    tracker = Tracker(net, "v1", MatchSettings(max_lag_fixes=30))
    sizes = []
    for f in fixes:
        tracker.update(f)
        sizes.append(len(tracker.to_bytes()))
    assert max(sizes[500:]) < 8000
    assert tracker.seq - tracker.next_commit < 31


def test_tracker_filters_with_reasons() -> None:
    """Duplicates, late fixes, poor accuracy and impossible jumps are filtered and named."""
    net = straight_road()
    t0 = 1_700_000_000.0
    tr = Tracker(net, "v1")
    reasons = []
    feed = [
        Fix("v1", t0, 0, 0, 100.0, 0.0),
        Fix("v1", t0, 0, 0, 100.0, 0.0),                    # duplicate
        Fix("v1", t0 + 2, 0, 0, 120.0, 0.0),
        Fix("v1", t0 + 1, 0, 0, 110.0, 0.0),                # out of order
        Fix("v1", t0 + 3, 0, 0, 130.0, 0.0, accuracy=500.0),  # low accuracy
        Fix("v1", t0 + 4, 0, 0, 900.0, 0.0),                # 780 m in 2 s: impossible
        Fix("v1", t0 + 5, 0, 0, 140.0, 0.0),
    ]
    for f in feed:
        reasons += [e.reason for e in tr.update(f) if isinstance(e, Filtered)]
    assert reasons == ["duplicate", "out_of_order", "low_accuracy", "impossible_jump"]


def test_tracker_trusts_jump_after_three_in_a_row() -> None:
    """A vehicle really moved (e.g. on a ferry): the third consecutive 'jump' is believed."""
    net = straight_road(3000.0)
    t0 = 1_700_000_000.0
    tr = Tracker(net, "v1")
    feed = [Fix("v1", t0, 0, 0, 100.0, 0.0)] + [
        Fix("v1", t0 + i, 0, 0, 2500.0 + 10 * i, 0.0) for i in range(1, 5)]
    out = [tr.update(f) for f in feed]
    assert [type(e[0]).__name__ for e in out] == [
        "Assignment", "Filtered", "Filtered", "Assignment", "Assignment"]


def test_tracker_reorder_buffer_puts_late_fix_in_place() -> None:
    """With reorder_fixes=2 a fix arriving one place late is still used, in time order."""
    net = straight_road()
    t0 = 1_700_000_000.0
    tr = Tracker(net, "v1", MatchSettings(reorder_fixes=2))
    feed = [Fix("v1", t0 + i, 0, 0, 100.0 + 10 * i, 0.0) for i in (0, 2, 1, 3, 4, 5)]
    events = [e for f in feed for e in tr.update(f)] + tr.flush()
    assert [a.t for a in assignments(events)] == [t0 + i for i in range(6)]


def test_tracker_sparse_fixes_bridge_corners() -> None:
    """Fixes every 30 s around corners: the committed path is connected and follows the roads."""
    net = grid(6)
    route = [(0.0, 0.0), (400.0, 0.0), (400.0, 600.0), (1000.0, 600.0)]
    pts = polyline_points(route, 10.0)[::30]   # 10 m/s sampled every 30 s
    fixes = fixes_along(pts, dt=30.0)
    events = run(Tracker(net, "v1"), fixes)
    path = committed_path(events)
    assert_connected(net, path)
    assert ways(net, path) == [1, 6, 7]


def test_tracker_single_fix_and_empty_flush() -> None:
    """Degenerate trips: flushing an empty tracker gives nothing; one fix gives one commit."""
    net = straight_road()
    tr = Tracker(net, "v1")
    assert tr.flush() == []
    events = run(tr, fixes_along([(500.0, 3.0)]))
    assert len(assignments(events)) == 1
    (c,) = commits(events)
    assert len(c.fixes) == 1 and len(c.path) == 1


def test_tracker_outlier_gets_interpolated_final_answer() -> None:
    """A filtered outlier still gets a final answer: the point on the committed path at its time."""
    net = straight_road(2000.0)
    pts = [(float(x), 0.0) for x in range(0, 400, 10)]
    fixes = fixes_along(pts)
    bad = fixes[20]
    fixes[20] = Fix(bad.vehicle, bad.t, 0.0, 0.0, bad.x, 900.0)  # 900 m off in 1 s
    events = run(Tracker(net, "v1"), fixes)
    assert [e.reason for e in events if isinstance(e, Filtered)] == ["impossible_jump"]
    final = {m.t: m for c in commits(events) for m in c.fixes}
    assert sorted(final) == [f.t for f in fixes]
    m = final[bad.t]
    assert abs(m.x - 200.0) < 1e-6 and abs(m.y) < 1e-6


def test_tracker_reads_older_lmt1_state() -> None:
    """A checkpoint in the older LMT1 format (JSON node rows) restores and continues.

    tests/data/states/test-osm-bus7-fix120.lmt1: a tracker after 120 fixes of a simulated
    drive on the pyrosm test extract (© OpenStreetMap contributors, ODbL). Restored from
    it, and restored again from its own LMT3 bytes, both continue identically.
    """
    import importlib.resources

    from livematch.mapdata.netfile import open_network
    from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive

    net = open_network(str(importlib.resources.files("pyrosm") / "data" / "test.osm.pbf"))
    blob = (Path(__file__).parent / "data" / "states" / "test-osm-bus7-fix120.lmt1").read_bytes()
    assert blob[:4] == b"LMT1"
    old = Tracker.from_bytes(net, None, blob)
    assert old.seq == 118 and old.vehicle == "bus-7"  # 120 fixes, 2 filtered
    assert any(len(lv.tree) for lv in old.levels)
    new = Tracker.from_bytes(net, None, old.to_bytes())
    assert old.to_bytes()[:4] == b"LMT6"
    d = simulate_drive(net, np.random.default_rng([41, 77]), "bus-7", 1.7e9,
                       DriveSettings(duration_s=240.0), drivable_segments(net))
    fixes = [Fix(d.vehicle, o.t, 0.0, 0.0, o.x, o.y, o.accuracy) for o in observe(d, 1)]
    assert run(old, fixes[120:]) == run(new, fixes[120:])


@pytest.mark.parametrize(("name", "every", "cut"), [
    ("test-osm-bus7-fix120.lmt2", 1, 120), ("test-osm-bus7-10s-fix30.lmt2", 10, 30)])
def test_tracker_reads_older_lmt2_state(name: str, every: int, cut: int) -> None:
    """An LMT2 checkpoint (rows with their matched points) continues like a run never saved.

    tests/data/states/*.lmt2 were written by the LMT2 code (commit df3bbc9) after ``cut``
    fixes of a simulated drive on the pyrosm test extract (© OpenStreetMap contributors,
    ODbL), one fix every ``every`` s; the 10 s one holds the spike test's copy of the
    levels, and its next fix drops a spike. Restored here, the matched points are
    recomputed from segment and position: the events from then on, and the LMT3 state
    at the end, equal those of a tracker that took every fix without a restore.
    """
    import importlib.resources

    from livematch.mapdata.netfile import open_network
    from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive

    net = open_network(str(importlib.resources.files("pyrosm") / "data" / "test.osm.pbf"))
    blob = (Path(__file__).parent / "data" / "states" / name).read_bytes()
    assert blob[:4] == b"LMT2"
    d = simulate_drive(net, np.random.default_rng([41, 77]), "bus-7", 1.7e9,
                       DriveSettings(duration_s=240.0 if every == 1 else 900.0),
                       drivable_segments(net))
    fixes = [Fix(d.vehicle, o.t, 0.0, 0.0, o.x, o.y, o.accuracy) for o in observe(d, every)]
    # the settings the states were written with (stop_turns was off by default then;
    # hold_filtered did not exist: such a state holds no answer to repeat)
    then = MatchSettings(stop_turns=False, hold_filtered=False)
    straight = Tracker(net, "bus-7", then)
    run(straight, fixes[:cut], flush=False)
    restored = Tracker.from_bytes(net, then, blob)
    assert (restored.before is not None) == (every == 10)
    assert restored.to_bytes() == straight.to_bytes()
    after = run(restored, fixes[cut:])
    assert after == run(straight, fixes[cut:])
    assert any(e.kind == "filtered" and e.reason == "spike" for e in after) == (every == 10)
    assert restored.to_bytes() == straight.to_bytes()
    assert restored.to_bytes()[:4] == b"LMT6"


def side_road_parallel() -> RoadNetwork:
    """Main road (way 1, y=0, x 0..400) and a side road (way 2) leaving it at x=100 and
    running 8 m north of it, parallel, to x=400 (a service road along a street)."""
    from livematch.core.build import Road, network_from_roads

    main = Road([(float(x), 0.0) for x in range(0, 401, 20)], way=1)
    side = Road([(100.0, 0.0), (110.0, 8.0), *[(float(x), 8.0) for x in range(140, 401, 30)]],
                way=2)
    return network_from_roads([main, side])


def test_tracker_live_answer_not_drawn_to_road_the_error_leans_to() -> None:
    """GNSS error leaning 6 m north for the whole drive (correlated error): after the side
    road leaves, it lies 2 m from every fix and the main road 6 m. Ranked by path cost the
    live answer moves to the side road; ranked by the live score (error_tau_s) an offset
    that stays is no evidence, the turn that would explain the fixes better is, and the
    live answer stays on the main road the vehicle never left."""
    net = side_road_parallel()
    fixes = fixes_along([(10.0 * i, 6.0) for i in range(1, 38)])
    far = [i for i, f in enumerate(fixes) if f.x >= 150.0]  # past any junction hold
    by_score = assignments(run(Tracker(net, "v1"), fixes))
    by_cost = assignments(run(Tracker(net, "v1", MatchSettings(error_tau_s=0.0)), fixes))
    assert {int(net.seg_way[by_score[i].segment]) for i in far} == {1}
    assert {int(net.seg_way[by_cost[i].segment]) for i in far} == {2}


def test_tracker_junction_hold_ends_past_junction_hold_m() -> None:
    """Fixes exactly between the two branches of a fork: which one is driven stays open, so
    the live answer waits at the fork (x=100) while the fix is within eps of it, but only
    while the best candidate has driven at most junction_hold_m past it."""
    from livematch.core.build import Road, network_from_roads

    net = network_from_roads([
        Road([(0.0, 0.0), (50.0, 0.0), (100.0, 0.0)], way=1),
        Road([(100.0, 0.0), (300.0, 40.0)], way=2),
        Road([(100.0, 0.0), (300.0, -40.0)], way=3),
    ])
    fixes = fixes_along([(5.0 * i, 0.0) for i in range(1, 30)])

    def held(settings: MatchSettings) -> list[float]:
        """x of the fixes past the fork whose live answer is the fork itself."""
        out = []
        for f, a in zip(fixes, assignments(run(Tracker(net, "v1", settings), fixes)),
                        strict=True):
            if f.x > 100.0 and int(net.seg_way[a.segment]) == 1:
                assert (a.x, a.y) == (100.0, 0.0)
                out.append(f.x)
        return out

    assert held(MatchSettings()) == [105.0, 110.0, 115.0]  # then more than eps (15 m) away
    assert held(MatchSettings(junction_hold_m=7.0)) == [105.0]  # then > 7 m past it
    assert held(MatchSettings(junction_hold=0.0)) == []


def test_tracker_forced_commit_by_live_score_on_dense_fixes() -> None:
    """The same leaning error, with a lag short enough that commits are forced while both
    roads are alive: at 1 s between fixes the forced commit takes the best candidate by
    live score (the main road); ranked by path cost it commits the side road."""
    net = side_road_parallel()
    fixes = fixes_along([(10.0 * i, 6.0) for i in range(1, 38)])
    settings = MatchSettings(max_lag_fixes=10)

    def committed_ways(settings: MatchSettings) -> set[int]:
        """Ways of the final answers of the fixes past x=150."""
        return {int(net.seg_way[m.segment]) for c in commits(run(Tracker(net, "v1", settings),
                                                                  fixes))
                for m in c.fixes if m.x >= 150.0}

    assert committed_ways(settings) == {1}
    assert committed_ways(MatchSettings(max_lag_fixes=10, error_tau_s=0.0)) == {2}


# ---------------------------------------------------------------- spike test
# A vehicle on Row 1 of the grid (way 3, y = 200), east at 10 m/s, a fix every 15 s.
SPARSE_PTS = [(50.0 + 150.0 * i, 201.0) for i in range(6)]


def test_tracker_spike_between_good_fixes_is_dropped() -> None:
    """A fix 150 m off the road between two good fixes 15 s apart is dropped one fix late.

    No speed bound catches it (300 m in 15 s is plausible). Matching the next fix straight
    from the one before the spike costs far less than going through it: the fix is
    reported as filtered (``spike``) and its final answer is the point on the committed
    path at its time (a leave-one-out test, see livematch.core.tracker).
    """
    net = grid()
    fixes = fixes_along(SPARSE_PTS, dt=15.0)
    bad = fixes[3]
    fixes[3] = Fix(bad.vehicle, bad.t, 0.0, 0.0, 500.0, 350.0)  # 150 m north of (500, 200)
    events = run(Tracker(net, "v1", MatchSettings(spike_cost=30.0)), fixes)
    assert [(e.t, e.reason) for e in events if isinstance(e, Filtered)] == [(bad.t, "spike")]
    path = committed_path(events)
    assert_connected(net, path)
    assert ways(net, path) == [3]
    final = {m.t: m for c in commits(events) for m in c.fixes}
    assert sorted(final) == [f.t for f in fixes]
    m = final[bad.t]
    # halfway in time between the matched neighbours at x = 350 and 650 on y = 200
    assert abs(m.x - 500.0) < 2.0 and m.y == 200.0
    # without the test the spike pulls the committed path off Row 1
    plain = run(Tracker(net, "v1", MatchSettings(spike_cost=0.0)), fixes)
    assert not any(isinstance(e, Filtered) for e in plain)
    assert ways(net, committed_path(plain)) != [3]


def test_tracker_genuine_dead_end_detour_is_not_dropped() -> None:
    """A fix at the end of a cul-de-sac, driven in and out between two fixes, stays.

    Its neighbours are both at the same spot 150 m down the cul-de-sac, so it looks like a
    spike by geometry alone; the path through it matches the vehicle's pace (150 m per
    15 s both ways), the path without it would have stood still for 30 s.
    """
    net = dead_end()
    # main road east from x = 50, up the cul-de-sac at x = 500 to its end, back, east
    route = [(50.0, 0.0), (500.0, 0.0), (500.0, 300.0), (500.0, 0.0), (1000.0, 0.0)]
    pts = polyline_points(route, 150.0)
    assert (500.0, 300.0) in pts
    fixes = fixes_along(pts, dt=15.0)
    events = run(Tracker(net, "v1", MatchSettings(spike_cost=30.0)), fixes)
    assert not any(isinstance(e, Filtered) for e in events)
    path = committed_path(events)
    assert_connected(net, path)
    assert ways(net, path) == [1, 2, 1]
    end = {m.t: m for c in commits(events) for m in c.fixes}[fixes[pts.index((500.0, 300.0))].t]
    assert math.hypot(end.x - 500.0, end.y - 300.0) < 1e-6


def test_tracker_spike_test_only_from_5_to_35_s() -> None:
    """At 1 s between fixes (the jump filter's bound is tight) and at 40 s the spike test
    never runs; at 30 s it drops a fix 150 m off between two good ones."""
    net = grid()
    dense = fixes_along(polyline_points(ROUTE, 10.0))
    assert (run(Tracker(net, "v1", MatchSettings(spike_cost=30.0)), dense)
            == run(Tracker(net, "v1", MatchSettings(spike_cost=0.0)), dense))
    for dt in (30.0, 40.0):
        sparse = fixes_along([(50.0 + 300.0 * i, 201.0) for i in range(3)], dt=dt)
        sparse[1] = Fix("v1", sparse[1].t, 0.0, 0.0, 350.0, 350.0)  # 150 m off
        events = run(Tracker(net, "v1", MatchSettings(spike_cost=30.0)), sparse)
        dropped = [(e.t, e.reason) for e in events if isinstance(e, Filtered)]
        final = {m.t: m for c in commits(events) for m in c.fixes}[sparse[1].t]
        if dt == 40.0:
            assert dropped == []
            assert events == run(Tracker(net, "v1", MatchSettings(spike_cost=0.0)), sparse)
            assert final.y != 200.0  # matched where the bad fix lies, off Row 1
        else:
            assert dropped == [(sparse[1].t, "spike")]
            # interpolated halfway in time between x = 50 and 650 on Row 1 (y = 200)
            assert abs(final.x - 350.0) < 2.0 and final.y == 200.0


@pytest.mark.parametrize("cut", [2, 3, 4, 5])
def test_tracker_restore_around_spike_gives_identical_outputs(cut: int) -> None:
    """Serialise before, at and just after a spike (the state before it is kept), restore:
    the events equal an uninterrupted run."""
    net = grid()
    fixes = fixes_along(SPARSE_PTS, dt=15.0)
    fixes[3] = Fix("v1", fixes[3].t, 0.0, 0.0, 500.0, 350.0)
    settings = MatchSettings(spike_cost=30.0)
    straight = Tracker(net, "v1", settings)
    whole = run(straight, fixes)
    assert any(isinstance(e, Filtered) for e in whole)
    first = Tracker(net, "v1", settings)
    before = run(first, fixes[:cut], flush=False)
    restored = Tracker.from_bytes(net, settings, first.to_bytes())
    assert (restored.before is None) == (first.before is None)
    assert restored.to_bytes() == first.to_bytes()
    after = run(restored, fixes[cut:])
    assert before + after == whole


def test_tracker_checkpoint_every_fix_around_an_unmatched_spike_is_canonical() -> None:
    """A spike no level matches (100 m from every road), dropped one fix late: a tracker
    checkpointed and restored at every fix holds the same state, byte for byte, and says
    the same as one never stopped.

    The unmatched fix moves the commit point past itself (no tree covers it); dropping it
    one fix later takes the commit point back to it, and the live score may then read
    the position of the fix before it. A checkpoint written in between has to keep that
    position too (it once kept only what the moved commit point needed, so a restored
    tracker rescored one link fewer than a tracker never stopped).
    """
    net = grid()
    fixes = fixes_along(SPARSE_PTS, dt=15.0)
    fixes[3] = Fix("v1", fixes[3].t, 0.0, 0.0, 500.0, 300.0)  # the middle of a block
    settings = MatchSettings(spike_cost=30.0)
    straight = Tracker(net, "v1", settings)
    chained = Tracker(net, "v1", settings)
    reasons = []
    dropped = False
    for f in fixes:
        chained = Tracker.from_bytes(net, settings, chained.to_bytes())
        said = straight.update(f)
        assert chained.update(f) == said
        assert chained.to_bytes() == straight.to_bytes()
        reasons += [e.reason for e in said if isinstance(e, Filtered)]
        dropped = dropped or fixes[3].t in straight.skipped
    # the case this test is about: the unmatched fix is dropped as a spike one fix later
    # (its time joins the skipped ones) and counted once, with the reason it was refused
    assert dropped
    assert reasons == ["no_road_nearby"]
    assert chained.flush() == straight.flush()


def test_tracker_spike_cost_validated() -> None:
    """spike_cost is a number >= 0 (0 turns the spike test off); a negative one is refused."""
    assert MatchSettings(spike_cost=0.0).problems() == []
    assert MatchSettings(spike_cost=-1.0).problems() == [
        ("spike_cost", "must be a number >= 0, got -1.0")]
    with pytest.raises(ValueError, match=r"matcher\.spike_cost must be a number >= 0"):
        Tracker(grid(), "v1", MatchSettings(spike_cost=math.nan))


def test_tracker_join_never_longer_than_vehicle_could_drive() -> None:
    """Two committed stretches on two parallel roads 40 m apart, 2 s apart in time, are
    joined by no route longer than 40 m/s x 2 s + 2 x eps (110 m): the only route
    between them, round the block by the rung at x=360, is 180 m, so the committed path
    breaks between the roads instead of drawing a loop nobody drove."""
    import networkx as nx

    from livematch.core.build import Road, network_from_roads

    south = Road([(float(x), 0.0) for x in (*range(0, 351, 50), 360, *range(400, 1001, 50))],
                 way=1)
    north = Road([(float(x), 40.0) for x in (*range(0, 351, 50), 360, *range(400, 1001, 50))],
                 way=2)
    rung = Road([(360.0, 0.0), (360.0, 40.0)], way=3)
    net = network_from_roads([south, north, rung])
    # 10 m/s east on the south road, then the fixes jump to the north road (the first
    # fix there is filtered as an impossible jump, the second is taken 2 s later)
    fixes = fixes_along([(float(x), 0.0) for x in range(0, 301, 10)]
                        + [(float(x), 40.0) for x in range(310, 601, 10)])
    settings = MatchSettings(eps_levels=(15.0,))
    path = committed_path(run(Tracker(net, "v1", settings), fixes))
    assert ways(net, path) == [1, 2]
    # outside check (networkx): from the south road at x=300 the north road at x=300,
    # where the eastbound segment holding x=320 begins, is 160 m away, 180 m to x=320
    g = nx.DiGraph()
    for s in range(net.n_segments):
        g.add_edge(int(net.seg_from[s]), int(net.seg_to[s]), length=float(net.seg_len[s]))
    node = {(float(x), float(y)): i for i, (x, y) in enumerate(net.node_xy.tolist())}
    around = nx.shortest_path_length(g, node[(300.0, 0.0)], node[(300.0, 40.0)],
                                     weight="length")
    assert around + 20.0 == 180.0 > 40.0 * 2.0 + 2.0 * 15.0


def test_tracker_fresh_small_level_stretch_that_breaks_path_left_to_older_level() -> None:
    """Three fixes drawn 22 m towards a road no route reaches: the 15 m level restarts on it
    for them, the 30 m level's older tree stays on the road driven; the commit goes to the
    older tree, so the committed path is the one road, unbroken (networkx's shortest path
    between its ends), and every fix is on it."""
    import networkx as nx

    main = Road([(float(x), 0.0) for x in range(0, 1001, 50)], way=1)
    # one way (a single candidate on it, which commits at once), joined to nothing
    island = Road([(float(x), 25.0) for x in range(300, 501, 50)], way=2, oneway=True)
    net = network_from_roads([main, island])
    pts = [(float(x), 22.0 if x in (400, 410, 420) else 0.0) for x in range(0, 701, 10)]
    events = run(Tracker(net, "v1", MatchSettings(eps_levels=(15.0, 30.0))),
                 fixes_along(pts))
    path = committed_path(events)
    assert_connected(net, path)
    assert ways(net, path) == [1]
    assert all(f.segment in path for c in commits(events) for f in c.fixes)
    # outside check (networkx): the route between the path's ends on the road graph, and
    # no route at all from the road driven to the other one
    g = nx.DiGraph()
    for s in range(net.n_segments):
        g.add_edge(int(net.seg_from[s]), int(net.seg_to[s]), seg=s)
    nodes = nx.shortest_path(g, int(net.seg_from[path[0]]), int(net.seg_to[path[-1]]))
    assert path == [g.edges[a, b]["seg"] for a, b in itertools.pairwise(nodes)]
    assert not nx.has_path(g, int(net.seg_from[path[0]]), int(net.seg_from[
        next(s for s in range(net.n_segments) if net.seg_way[s] == 2)]))


@pytest.mark.parametrize("dt", [1.0, 15.0, 30.0])
def test_tracker_first_fix_at_segment_end_reported_on_segment_entered(dt: float) -> None:
    """A trip whose first fix matches the very end of a segment starts on the segment entered.

    Plain data: road 1 runs east to the vertex (100, 0), road 2 north from it (a 5 m
    segment, then 95 m). The first fix lies outside both, 4.24 m from the vertex, so the
    vertex is its matched point on either road; the path must not claim road 1, of which
    the vehicle drove nothing.
    """
    net = network_from_roads([
        Road([(0.0, 0.0), (100.0, 0.0)], way=1, oneway=True),
        Road([(100.0, 0.0), (100.0, 5.0), (100.0, 100.0)], way=2, oneway=True),
    ])
    pts = [(103.0, -3.0), (100.0, 30.0), (100.0, 60.0), (100.0, 90.0)]
    events = run(Tracker(net, "v1"), fixes_along(pts, dt=dt))
    first = commits(events)[0].fixes[0]
    assert (first.segment, first.offset_m, first.x, first.y) == (1, 0.0, 100.0, 0.0)
    path = committed_path(events)
    assert path == [1, 2]
    assert_connected(net, path)


def _turn_at_shape_point(settings: MatchSettings, xs: list[float]) -> tuple[list[int], list[bool]]:
    """Fixes every 15 s at ``xs`` along a 2 km two-way road with shape points at x = 300
    and 600 (a dead end 1.4 km beyond): the committed path and, per fix, whether its
    final answer heads east."""
    pts = [(0.0, 0.0), (300.0, 0.0), (600.0, 0.0), (2000.0, 0.0)]
    net = network_from_roads([Road(pts, way=7)])
    assert tuple(net.node_xy[2]) == (600.0, 0.0)  # vertex ids follow the road's points
    tracker = Tracker(net, "van3", settings)
    events = []
    for i, x in enumerate(xs):
        events += tracker.update(Fix("van3", 15.0 * i, 0.0, 0.0, x, 2.0, 5.0))
    events += tracker.flush()
    path = committed_path(events)
    final = {f.t: f.segment for e in events if isinstance(e, Commit) for f in e.fixes}
    return path, [bool(net.node_xy[net.seg_to[s], 0] > net.node_xy[net.seg_from[s], 0])
                  for _, s in sorted(final.items())]


STOP_THEN_BACK = [0.0, 150.0, 300.0, 450.0, 600.0, 600.0, 600.0, 450.0, 300.0, 150.0, 30.0]


@pytest.mark.parametrize("settings", [MatchSettings(street_turns=True, stop_turns=False),
                                      MatchSettings(stop_turns=True, street_turn_cost=0.0),
                                      MatchSettings()])
def test_tracker_street_turns_follow_a_turn_in_the_middle_of_a_road(
        settings: MatchSettings) -> None:
    """15 s fixes east along the road, a stop at the shape point 600 m in, then back west:
    with street_turns, or stop_turns (the vehicle stood there), the tree goes on through
    a U-turn at the shape point, so the last fix at the stop is already answered on the
    way back (stop_turns is on by default); without either the tracker can only restart
    there and leave it heading east."""
    # vertex_in_segment off: at the shape point it would report the stop fixes as the end
    # of the segment they came in by (east), the same point, whichever way the tree went on
    path, east = _turn_at_shape_point(replace(settings, vertex_in_segment=False),
                                      STOP_THEN_BACK)
    assert path == [0, 2, 3, 1]  # east to the shape point, turned there, back west
    assert east[:4] == [True] * 4 and east[6:] == [False] * 5
    _, east_default = _turn_at_shape_point(MatchSettings(stop_turns=False), STOP_THEN_BACK)
    assert east_default[6] is True and east_default[7:] == [False] * 4


def _stand_and_turn_back(settings: MatchSettings) -> tuple[RoadNetwork, list[Commit]]:
    """1 Hz fixes on a 400 m two-way road with a shape point every 5 m: east from x = 30
    to the shape point at x = 200 at 10 m/s, an 80 s stand there while the GNSS error
    leans ahead (0.5 m/s up to 6 m, then held), then back west at 10 m/s."""
    net = network_from_roads([Road([(float(x), 0.0) for x in range(0, 405, 5)], way=7)])
    xs = ([30.0 + 10.0 * i for i in range(18)] + [200.0 + min(6.0, 0.5 * i) for i in range(80)]
          + [200.0 - 10.0 * i for i in range(1, 18)])
    tracker = Tracker(net, "van4", settings)
    events = []
    for i, x in enumerate(xs):
        events += tracker.update(Fix("van4", float(i), 0.0, 0.0, x, 2.0, 5.0))
    events += tracker.flush()
    return net, commits(events)


def test_tracker_stand_then_back_is_not_committed_ahead_of_the_stand() -> None:
    """A vehicle that stands at 1 Hz longer than max_lag_fixes and then leaves the way it
    came: with stand_wait (the default) no fix is committed on road beyond the stand,
    where the vehicle never drove; without it the forced commit during the stand picks a
    candidate the leaning error drew ahead, and the stand is committed there."""
    shapely = pytest.importorskip("shapely")
    road = shapely.LineString([(0.0, 0.0), (400.0, 0.0)])

    def reach(net: RoadNetwork, seg: int) -> float:
        # how far along the road the segment reaches, by shapely's linear referencing
        ends = (net.node_xy[net.seg_from[seg]], net.node_xy[net.seg_to[seg]])
        return max(road.project(shapely.Point(*xy)) for xy in ends)

    net, done = _stand_and_turn_back(MatchSettings())
    fixes = [f for c in done for f in c.fixes]
    assert [f.t for f in fixes] == [float(i) for i in range(115)]
    assert max(reach(net, f.segment) for f in fixes) <= 200.0
    assert max(reach(net, s) for c in done for s in c.path) <= 200.0
    net, done = _stand_and_turn_back(MatchSettings(stand_wait=False))
    ahead = [f.t for c in done for f in c.fixes if reach(net, f.segment) > 200.0]
    assert len(ahead) >= 60  # the stand (fixes 18-97) committed ahead


def test_tracker_stop_turns_turn_round_where_a_1hz_vehicle_stood() -> None:
    """With stop_turns, the stand itself is the evidence at 1 Hz: the smallest level dies
    a few seconds after the vehicle set off back west, when the last step is fast, and is
    bridged through a U-turn at the shape point where it stood. Every fix on the way back
    is answered heading west and the committed path is one connected route (without the
    stand's evidence the way back was committed heading east, standing at x = 146-150)."""
    net, done = _stand_and_turn_back(MatchSettings(stop_turns=True))
    path = [s for c in done for s in c.path]
    assert_connected(net, path)
    back = [f for c in done for f in c.fixes if f.t >= 100.0]
    assert len(back) == 15
    assert all(net.node_xy[net.seg_to[f.segment], 0] < net.node_xy[net.seg_from[f.segment], 0]
               for f in back)
