"""``start_roots``: a log that begins beside a parallel road is committed from the right root.

Plain data: road A runs east along y = 0 (A1 to x = 200, A2 on to x = 400); road B runs
east along y = 8 and joins A at (200, 0) through a short link. A vehicle drives A from
its first fix; its GNSS error leans 5 m north (towards B) for the whole stretch, the
wandering error of consumer GNSS that stays for tens of seconds.

Outside references: shapely projects each fix on the road lines (the offsets of the two
explanations), and scipy's multivariate normal density, with the exponential
(first-order Gauss-Markov) covariance sigma^2 exp(-|dt| / tau) per axis (Ranacher et
al., IJGIS 2016, on temporally correlated GNSS error), says which explanation of the
fixes is the more likely: staying on A with a steady offset, or B and then the link.
"""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from scipy.stats import multivariate_normal

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit, Event
from livematch.core.settings import MatchSettings
from livematch.core.startroots import best_root, replay
from livematch.core.sweep import StepContext, fresh_start
from livematch.core.view import view_of
from tests.catalogue import committed_path as path
from tests.catalogue import final_answers as finals
from tests.catalogue import track_points

A1 = [(0.0, 0.0), (200.0, 0.0)]
A2 = [(200.0, 0.0), (400.0, 0.0)]
B = [(0.0, 8.0), (190.0, 8.0), (200.0, 0.0)]
NET = network_from_roads([Road(A1, way=1, oneway=True), Road(A2, way=2, oneway=True),
                          Road(B, way=3, oneway=True)])
SEG_A1, SEG_A2, SEG_B, SEG_LINK = 0, 1, 2, 3  # network_from_roads order
EPS = 15.0
N = 36
# 10 m/s east along A, every fix 5 m north of it (1 s apart)
PTS = [(5.0 + 10.0 * i, 5.0) for i in range(N)]
MERGE = 19  # the last fix before x = 200


def run(settings: MatchSettings, pts: list[tuple[float, float]] = PTS, dt: float = 1.0,
        restore_at: int | None = None) -> list[Event]:
    return track_points(NET, settings, pts, dt, restore_at)


def first_commit(events: list[Event]) -> Commit:
    return next(e for e in events if isinstance(e, Commit))


def test_segments_of_the_network_are_as_assumed() -> None:
    """The segments the tests name (their end points as built)."""
    assert NET.segment_coords(SEG_A1) == (0.0, 0.0, 200.0, 0.0)
    assert NET.segment_coords(SEG_A2) == (200.0, 0.0, 400.0, 0.0)
    assert NET.segment_coords(SEG_B) == (0.0, 8.0, 190.0, 8.0)
    assert NET.segment_coords(SEG_LINK) == (190.0, 8.0, 200.0, 0.0)


def _log_density(matched: list[tuple[float, float]], pts: list[tuple[float, float]],
                 dt: float, sigma: float = 5.0, tau: float = 30.0) -> float:
    """log p(errors) of one explanation: Gauss-Markov error, each axis independent."""
    t = np.arange(len(pts)) * dt
    cov = sigma * sigma * np.exp(-np.abs(t[:, None] - t[None, :]) / tau)
    err = np.asarray(matched) - np.asarray(pts)
    mvn = multivariate_normal(mean=np.zeros(len(pts)), cov=cov)
    return float(mvn.logpdf(err[:, 0]) + mvn.logpdf(err[:, 1]))


def _nearest(line: list[tuple[float, float]], p: tuple[float, float]) -> tuple[float, float]:
    g = shapely.LineString(line)
    q = g.interpolate(g.project(shapely.Point(p)))
    return (q.x, q.y)


def test_steady_offset_on_a_is_the_more_likely_explanation() -> None:
    """scipy: under correlated error, A with a steady 5 m offset beats B then the link.

    The independent-error view (a sum of squared distances, as the path cost charges
    them) prefers B before the merge (3 m against 5 m); the correlated one does not.
    """
    on_a = [_nearest(A1 + A2[1:], p) for p in PTS]
    on_b = [_nearest(B, p) if i <= MERGE else _nearest(A2, p) for i, p in enumerate(PTS)]
    assert _log_density(on_a, PTS, 1.0) > _log_density(on_b, PTS, 1.0)
    sq = [sum((np.asarray(m) - np.asarray(p)) ** 2) for m, p in zip(on_b, PTS, strict=True)]
    sq_a = [sum((np.asarray(m) - np.asarray(p)) ** 2) for m, p in zip(on_a, PTS, strict=True)]
    assert sum(sq) < sum(sq_a)


def test_without_the_rule_the_first_fixes_are_committed_on_b() -> None:
    """The case the rule is for: every candidate descends from B's root by the commit."""
    events = run(MatchSettings(start_roots=False))
    got = finals(events)
    assert {got[float(i)][0] for i in range(MERGE)} == {SEG_B}
    assert got[float(MERGE)][0] in (SEG_B, SEG_LINK)
    assert path(events)[:3] == [SEG_B, SEG_LINK, SEG_A2]


def test_start_roots_commits_the_first_fixes_on_a() -> None:
    """With the rule the fixes before the merge are on A1 (shapely: on its line, within
    eps of their fixes), the rest on A2, and the path is A1, A2 without B."""
    events = run(MatchSettings(start_roots=True))
    got = finals(events)
    line = shapely.LineString(A1)
    for i in range(MERGE + 1):
        seg, offset, x, y = got[float(i)]
        assert seg == SEG_A1
        assert line.distance(shapely.Point(x, y)) < 1e-6
        assert offset == pytest.approx(line.project(shapely.Point(x, y)), abs=1e-6)
        assert shapely.Point(x, y).distance(shapely.Point(PTS[i])) <= EPS
    assert {got[float(i)][0] for i in range(MERGE + 1, N)} == {SEG_A2}
    assert path(events) == [SEG_A1, SEG_A2]


def test_restore_mid_way_gives_the_same_events() -> None:
    """A tracker restored from its bytes before and after the first commit agrees."""
    base = run(MatchSettings(start_roots=True))
    for at in (10, 25):
        assert run(MatchSettings(start_roots=True), restore_at=at) == base


def test_a_vehicle_on_b_is_left_on_b() -> None:
    """Fixes close to B, then to A after the link: B's root ranks best, nothing moves."""
    pts = [(5.0 + 10.0 * i, 7.5 if i <= MERGE else 0.5) for i in range(N)]
    on = run(MatchSettings(start_roots=True), pts)
    off = run(MatchSettings(start_roots=False), pts)
    assert on == off
    assert path(on)[:2] == [SEG_B, SEG_LINK]


def test_sparse_fixes_rank_by_path_cost() -> None:
    """5 s between fixes: ranked by path cost. Swept alone, A1's root reaches A2 cheaper
    than B's (the union settles the merge vertex from B, reached earlier along the fix
    step), so the rule commits A1 here too; without it the commit starts on B."""
    pts = PTS[::5]
    s = MatchSettings()
    roots, _ = _roots_and_fixes(pts)
    fixes = [(i + 1, 5.0 * i, x, y) for i, (x, y) in enumerate(pts)]
    cost = {r: replay(NET, s, EPS, roots[r], fixes)[SEG_A2].cost for r in (SEG_A1, SEG_B)}
    assert cost[SEG_A1] < cost[SEG_B]
    on = finals(run(MatchSettings(start_roots=True), pts, dt=5.0))
    off = finals(run(MatchSettings(start_roots=False), pts, dt=5.0))
    assert on[0.0][0] == SEG_A1
    assert off[0.0][0] == SEG_B


def _roots_and_fixes(pts: list[tuple[float, float]]) -> tuple[dict, list]:
    s = MatchSettings()
    ctx = StepContext.between(view_of(NET), s, EPS, *pts[0], *pts[0], 1, 0.0)
    fixes = [(i + 1, float(i), x, y) for i, (x, y) in enumerate(pts)]
    return fresh_start(NET, ctx), fixes


def test_replay_from_each_root_alone() -> None:
    """Swept alone, A1's root is on A2 at the last fix through A1 only; B's through B."""
    roots, fixes = _roots_and_fixes(PTS)
    assert sorted(roots) == [SEG_A1, SEG_B]
    for root, first in ((SEG_A1, [SEG_A1]), (SEG_B, [SEG_B, SEG_LINK])):
        live = replay(NET, MatchSettings(), EPS, roots[root], fixes)
        assert sorted(live) == [SEG_A2]
        node, segs = live[SEG_A2], []
        while node is not None:
            segs.append(node.seg)
            node = node.parent
        walked = []
        for s in reversed(segs):
            if not walked or walked[-1] != s:
                walked.append(s)
        assert walked[:len(first)] == first


def test_best_root_picks_a_and_keeps_the_winner() -> None:
    """best_root: A1's states when the tree's best root is B; None when it is A1."""
    _, fixes = _roots_and_fixes(PTS)
    s = MatchSettings()
    got = best_root(NET, s, EPS, SEG_B, fixes, 5.0)
    assert got is not None and sorted(got) == [SEG_A2]
    node = got[SEG_A2]
    while node.parent is not None:
        node = node.parent
    assert node.seg == SEG_A1
    assert best_root(NET, s, EPS, SEG_A1, fixes, 5.0) is None
    # one fix, or no root but one: nothing to rank
    assert best_root(NET, s, EPS, SEG_B, fixes[:1], 5.0) is None
