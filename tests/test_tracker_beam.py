"""Rule ``beam_margin`` / ``beam_keep``: a cost beam over the levels above the smallest live one.

The plain case: a street east along y = 0, and two side roads parallel to it, 25 m and
45 m north, each joined to the street by a ramp at both ends. The vehicle drives the
street at 10 m/s, one fix a second, the fixes on it. The 15 m level holds the street
only; the 30 m level the street and the 25 m road; the 60 m level all three. A state on
the 25 m road pays 25^2 / (2 * 5^2) = 12.5 a fix more than one on the street (the
distance term of the path cost, sigma_m 5 m), one on the 45 m road 40.5: with a margin of
5 both side roads leave the upper levels at their first step on the straight.
"""

from __future__ import annotations

from dataclasses import replace

import pytest
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.candidates import CandidateTree
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.core.view import view_of
from tests.catalogue import assert_answers_on_road, final_answers, track_points
from tests.test_candidates import drive, osm

STREET = [(float(x), 0.0) for x in range(0, 801, 50)]
MARGIN = MatchSettings(beam_margin=5.0)
KEEP = MatchSettings(beam_keep=1)
REFINED = MatchSettings(beam_keep=1, beam_top=True, beam_guard=True, beam_moving=True)


def _street_and_side_roads() -> RoadNetwork:
    roads = [Road(STREET, way=1)]
    for way, y in ((2, 25.0), (3, 45.0)):
        roads.append(Road([(0.0, 0.0), (50.0, y)] + [(float(x), y) for x in range(100, 701, 50)]
                          + [(750.0, 0.0)], way=way))
    return network_from_roads(roads)


def _pts() -> list[tuple[float, float]]:
    return [(10.0 * i, 0.0) for i in range(70)]


def _fed(net: RoadNetwork, settings: MatchSettings, n: int) -> Tracker:
    tracker = Tracker(net, "v", settings)
    for i, (x, y) in enumerate(_pts()[:n]):
        tracker.update(Fix("v", float(i), 0.0, 0.0, x, y))
    return tracker


def _live_points(net: RoadNetwork, tree: CandidateTree) -> list[shapely.Point]:
    view = view_of(net)
    return [shapely.Point(tree.point(view, r)[2:]) for r in range(tree.lo, tree.hi)]


def test_beam_margin_drops_the_side_roads_from_the_upper_levels() -> None:
    """Off, the 60 m level keeps states on the side roads 25 and 45 m away; with a margin
    of 5 every upper level's live states lie on the street (shapely distance) and cost at
    most 5 more than its best; the 15 m level, which decides, is the same on and off."""
    net = _street_and_side_roads()
    street = shapely.LineString(STREET)
    off = _fed(net, MatchSettings(), 30)
    on = _fed(net, MARGIN, 30)
    far = [p for p in _live_points(net, off.levels[2].tree) if street.distance(p) > 20.0]
    assert far  # the states the rule drops (shapely: more than 20 m from the street)
    for level in on.levels[1:]:
        tree = level.tree
        assert tree.hi > tree.lo
        assert all(street.distance(p) < 1e-9 for p in _live_points(net, tree))  # shapely
        costs = tree.costs()
        assert costs.max() <= costs.min() + 5.0
    small_off, small_on = off.levels[0].tree, on.levels[0].tree
    assert _live_points(net, small_off) == _live_points(net, small_on)
    assert small_off.costs().tolist() == small_on.costs().tolist()


def test_beam_keep_holds_at_most_that_many_states_in_the_upper_levels() -> None:
    """With ``beam_keep`` 1 each upper level holds one live state after every fix, the
    best by path cost; off, the 60 m level holds more; the smallest is never thinned."""
    net = _street_and_side_roads()
    off = Tracker(net, "v", MatchSettings())
    on = Tracker(net, "v", KEEP)
    most_off = 0
    for i, (x, y) in enumerate(_pts()[:40]):
        fix = Fix("v", float(i), 0.0, 0.0, x, y)
        off.update(fix)
        on.update(fix)
        most_off = max(most_off, off.levels[2].tree.hi - off.levels[2].tree.lo)
        for level in on.levels[1:]:
            assert level.tree.hi - level.tree.lo == 1
        assert (on.levels[0].tree.hi - on.levels[0].tree.lo
                == off.levels[0].tree.hi - off.levels[0].tree.lo)
    assert most_off > 1


def test_beam_leaves_the_answers_on_the_street() -> None:
    """On the straight street the events with the rule are those without it: every final
    answer on the street within eps of its fix (shapely). The upper levels, left with one
    state (``beam_keep`` 1), agree at once, but only the first covering level commits by
    agreement while the rule is on, so the commits come when they did."""
    net = _street_and_side_roads()
    pts = _pts()
    plain = track_points(net, MatchSettings(), pts)
    for settings in (MARGIN, KEEP, REFINED):
        events = track_points(net, settings, pts)
        assert_answers_on_road(final_answers(events), pts, 1.0, STREET, 15.0)
        assert events == plain


@pytest.mark.parametrize("restore_at", [10, 35])
def test_beam_restored_mid_drive_goes_on_the_same(restore_at: int) -> None:
    """A tracker checkpointed and restored mid-drive gives the same events as one that never
    stopped (the setting is not state: the trees kept are the thinned ones)."""
    net = _street_and_side_roads()
    for settings in (MARGIN, KEEP, REFINED):
        assert track_points(net, settings, _pts(), restore_at=restore_at) == \
            track_points(net, settings, _pts())


def test_beam_spares_the_deciding_and_the_oldest_covering_level() -> None:
    """The smallest live level is never thinned (here the 30 m one, the 15 m tree being
    dead), nor the smallest level covering the oldest pending fix when a smaller tree
    began after it; the levels above those are."""
    net = _street_and_side_roads()
    tracker = _fed(net, MatchSettings(), 12)
    assert tracker.levels[2].tree.hi - tracker.levels[2].tree.lo > 1
    assert tracker.levels[1].tree.hi - tracker.levels[1].tree.lo > 1
    # the 15 m tree dead: the 30 m level decides
    dead = Tracker.from_bytes(net, KEEP, tracker.to_bytes())
    dead.levels[0].tree = CandidateTree()
    before = dead.levels[1].tree.hi - dead.levels[1].tree.lo
    dead._beam()
    assert dead.levels[1].tree.hi - dead.levels[1].tree.lo == before
    assert dead.levels[2].tree.hi - dead.levels[2].tree.lo == 1
    # the 15 m tree began after the oldest pending fix: the 30 m level covers it
    young = Tracker.from_bytes(net, KEEP, tracker.to_bytes())
    young.levels[0].tree_seq = young.next_commit + 1
    young._beam()
    assert young.levels[1].tree.hi - young.levels[1].tree.lo == before
    assert young.levels[2].tree.hi - young.levels[2].tree.lo == 1
    # both young and covered by the 30 m level from the start: the 30 m level is thinned
    old = Tracker.from_bytes(net, KEEP, tracker.to_bytes())
    old._beam()
    assert old.levels[1].tree.hi - old.levels[1].tree.lo == 1


def test_beam_is_off_by_default_and_validated() -> None:
    """The keys are 0 (off; ``beam_max_gap_s``: no gate) by default; the margin and the
    gap a finite number >= 0, the count an integer >= 0."""
    defaults = MatchSettings()
    assert (defaults.beam_margin, defaults.beam_keep, defaults.beam_max_gap_s) == (0.0, 0, 0.0)
    for name in ("beam_margin", "beam_max_gap_s"):
        for bad in (-1.0, float("nan"), float("inf"), "3"):
            problems = MatchSettings(**{name: bad}).problems()
            assert (name, f"must be a number >= 0, got {bad!r}") in problems
    for bad_k in (-1, 2.5, "3", True):
        problems = MatchSettings(beam_keep=bad_k).problems()  # type: ignore[arg-type]
        assert ("beam_keep", f"must be an integer >= 0, got {bad_k!r}") in problems
    assert MatchSettings(beam_margin=3.0, beam_keep=4, beam_max_gap_s=2.5).problems() == []


def _spread(net: RoadNetwork) -> Tracker:
    """A tracker fed 12 fixes without the rule: both upper levels hold several states."""
    tracker = _fed(net, MatchSettings(), 12)
    for level in tracker.levels[1:]:
        assert level.tree.hi - level.tree.lo > 1
    return tracker


def test_beam_top_thins_only_the_largest_level() -> None:
    """With ``beam_top`` the 30 m level is left whole and only the 60 m one thinned."""
    net = _street_and_side_roads()
    tracker = _spread(net)
    before = tracker.levels[1].tree.hi - tracker.levels[1].tree.lo
    top = Tracker.from_bytes(net, MatchSettings(beam_keep=1, beam_top=True), tracker.to_bytes())
    top._beam()
    assert top.levels[1].tree.hi - top.levels[1].tree.lo == before
    assert top.levels[2].tree.hi - top.levels[2].tree.lo == 1


def test_beam_moving_thins_nothing_at_a_stand() -> None:
    """With ``beam_moving`` no level is thinned while a stand is on (``stand_seq``), and
    the levels are thinned as without it once the vehicle moves."""
    net = _street_and_side_roads()
    tracker = _spread(net)
    widths = [lv.tree.hi - lv.tree.lo for lv in tracker.levels]
    moving = MatchSettings(beam_keep=1, beam_moving=True)
    stands = Tracker.from_bytes(net, moving, tracker.to_bytes())
    stands.stand_seq = stands.next_commit
    stands._beam()
    assert [lv.tree.hi - lv.tree.lo for lv in stands.levels] == widths
    moves = Tracker.from_bytes(net, moving, tracker.to_bytes())
    assert moves.stand_seq == 0
    moves._beam()
    assert [lv.tree.hi - lv.tree.lo for lv in moves.levels[1:]] == [1, 1]


def test_beam_guard_keeps_what_the_smaller_level_holds() -> None:
    """With ``beam_guard`` a thinned level drops no state whose segment is live in the next
    smaller live level, checked on a real drive (Helsinki, 1 s) before every fix; without
    it the same states are dropped (the guard kept more states, at least once)."""
    net = osm("Helsinki")
    fixes = drive(net, 3, 1, seconds=240.0)
    plain = Tracker(net, "v3", MatchSettings())
    guarded = MatchSettings(beam_keep=1, beam_guard=True)
    extra = 0
    for fix in fixes:
        plain.update(fix)
        live = [lv for lv in plain.levels if lv.tree.hi > lv.tree.lo]
        if len(live) < 2:
            continue
        blob = plain.to_bytes()
        on = Tracker.from_bytes(net, guarded, blob)
        bare = Tracker.from_bytes(net, KEEP, blob)
        on._beam()
        bare._beam()
        trees = [lv.tree for lv in on.levels if lv.tree.hi > lv.tree.lo]
        for small, large, was in zip(trees, trees[1:], live[1:], strict=False):
            kept = {large.seg_of(r) for r in range(large.lo, large.hi)}
            held = {small.seg_of(r) for r in range(small.lo, small.hi)}
            before = {was.tree.seg_of(r) for r in range(was.tree.lo, was.tree.hi)}
            assert before & held <= kept
        extra += sum(a.tree.hi - a.tree.lo - (b.tree.hi - b.tree.lo)
                     for a, b in zip(on.levels, bare.levels, strict=True))
    assert extra > 0


GATED = MatchSettings(beam_margin=20.0, beam_keep=8, beam_top=True, beam_guard=True,
                      beam_moving=True, beam_max_gap_s=2.5)


def test_beam_max_gap_s_leaves_a_sparse_reporter_as_without_the_beam() -> None:
    """With ``beam_max_gap_s`` 2.5 a drive reported every 5 s (Helsinki) gives the events
    and the state bytes of the tracker without the beam after every fix; without the gate
    the same beam thinned that drive (the state differed)."""
    net = osm("Helsinki")
    fixes = drive(net, 3, 5, seconds=600.0)
    plain = Tracker(net, "v3", MatchSettings())
    gated = Tracker(net, "v3", GATED)
    ungated = Tracker(net, "v3", replace(GATED, beam_max_gap_s=0.0))
    differed = 0
    for fix in fixes:
        want = plain.update(fix)
        assert gated.update(fix) == want
        ungated.update(fix)
        assert gated.to_bytes() == plain.to_bytes()
        differed += ungated.to_bytes() != plain.to_bytes()
    assert gated.flush() == plain.flush()
    assert differed > 0


def test_beam_max_gap_s_thins_within_the_gap_only() -> None:
    """On the street with its side roads: at fixes 1 s apart the gated beam thins each
    upper level to one state (``beam_keep`` 1), as the ungated one does after every fix;
    at the first fix (no gap known) and at the fix after a 3 s gap it thins nothing, so
    the 60 m level then holds the side roads' states too."""
    net = _street_and_side_roads()
    gated = Tracker(net, "v", MatchSettings(beam_keep=1, beam_max_gap_s=2.5))
    pts = _pts()
    gated.update(Fix("v", 0.0, 0.0, 0.0, *pts[0]))
    assert gated.levels[2].tree.hi - gated.levels[2].tree.lo > 1
    for i in range(1, 12):
        gated.update(Fix("v", float(i), 0.0, 0.0, *pts[i]))
        assert [lv.tree.hi - lv.tree.lo for lv in gated.levels[1:]] == [1, 1]
    gated.update(Fix("v", 14.0, 0.0, 0.0, *pts[14]))  # 3 s after the fix before
    assert gated.levels[2].tree.hi - gated.levels[2].tree.lo > 1

