"""The committed path at a stand beside a short branch (stand_loops), through Tracker.update."""

from __future__ import annotations

import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit, MatchedFix
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker

shapely = pytest.importorskip("shapely")

# A two-way road west-east with a shape point every 5 m (segments as short as Helsinki's),
# a junction at x = 200 where it goes on east and a 5 m dead-end stub leaves north. A van
# drives east at 10 m/s from x = 30 with its fixes 2 m north of the road, stands at the
# junction for 60 s while the GNSS error leans north by up to 6 m (0.1 m/s, then held:
# correlated error), then leaves the way it came (west at 10 m/s).
STAND_FIRST, STAND_LAST = 17, 77  # fix indices of the stand
JUNCTION = (200.0, 0.0)
STUB = [(200.0, 0.0), (200.0, 5.0)]
FIXES = ([(30.0 + 10.0 * i, 2.0) for i in range(18)]
         + [(200.0, 2.0 + min(4.0, 0.1 * i)) for i in range(1, 61)]
         + [(200.0 - 10.0 * i, 2.0) for i in range(1, 18)])


def _network() -> RoadNetwork:
    road = [(float(x), 0.0) for x in range(0, 405, 5)]
    return network_from_roads([Road(road, way=7), Road(STUB, way=8)])


def _commits(settings: MatchSettings, fixes: list[tuple[float, float]] | None = None,
             ) -> tuple[RoadNetwork, list[Commit]]:
    net = _network()
    tracker = Tracker(net, "van9", settings)
    events = [e for i, (x, y) in enumerate(fixes or FIXES)
              for e in tracker.update(Fix("van9", float(i), 0.0, 0.0, x, y, 5.0))]
    return net, [e for e in events + tracker.flush() if isinstance(e, Commit)]


def _settled(commits: list[Commit]) -> list[MatchedFix]:
    return [f for c in commits for f in c.fixes]


def _ways(net: RoadNetwork, commits: list[Commit]) -> set[int]:
    return {net.source_ids(s)[0] for c in commits for s in c.path}


def test_tracker_stand_loops_commits_the_stand_at_the_junction() -> None:
    """Every fix of the stand is committed at the junction, on the segment the van came in
    by, and the committed path never enters the stub; without stand_loops the path goes
    into the stub, turns at its end and comes back, and the stand is committed on it."""
    # the innermost loop first: with stand_loops_outer (the default) the stand goes to the
    # outermost loop's vertex, the shape point 10 m before the junction on the road the
    # van came in by (tests/test_tracker_standvertex.py)
    net, commits = _commits(MatchSettings(stand_loops_outer=False))
    settled = _settled(commits)
    assert [f.t for f in settled] == [float(i) for i in range(len(FIXES))]
    for f in settled[STAND_FIRST + 1:STAND_LAST + 1]:
        assert (f.x, f.y) == pytest.approx(JUNCTION)
        assert net.source_ids(f.segment)[0] == 7
        assert float(net.node_xy[net.seg_to[f.segment], 0]) == pytest.approx(200.0)
    assert _ways(net, commits) == {7}
    net, old = _commits(MatchSettings(stand_loops=False))
    assert _ways(net, old) == {7, 8}
    on_stub = [f for f in _settled(old) if net.source_ids(f.segment)[0] == 8]
    assert len(on_stub) >= 40


def test_tracker_stand_loops_keeps_the_certificate() -> None:
    """The committed path still lies within Fréchet distance eps (15 m, the smallest
    level, which never dies here) of the fixes: shapely's frechet_distance of the
    densified curves (a discrete distance, an upper bound of the continuous one) between
    the trace and the committed path from the first settled point to the last."""
    net, commits = _commits(MatchSettings())
    settled = _settled(commits)
    path = [s for c in commits for s in c.path]
    points = [(settled[0].x, settled[0].y)]
    for s in path[1:]:
        points.append(tuple(float(v) for v in net.node_xy[net.seg_from[s]]))
    points.append((settled[-1].x, settled[-1].y))
    trace = shapely.LineString(FIXES)
    # densify 0.1: each segment cut in 10 (at most 1 m here); GEOS took minutes at 0.05-0.07
    assert shapely.frechet_distance(trace, shapely.LineString(points), densify=0.1) <= 15.0


def test_tracker_stand_loops_leaves_a_real_excursion_alone() -> None:
    """A van that drives 18 m up a 20 m branch, stands there for 30 s and comes back out
    made a real out-and-back loop: its fixes there lie beyond eps (15 m) of the junction,
    so the commits are the same with and without stand_loops, and the path enters the
    branch."""
    road = [(float(x), 0.0) for x in range(0, 405, 5)]
    branch = [(200.0, 0.0), (200.0, 10.0), (200.0, 20.0)]
    net = network_from_roads([Road(road, way=7), Road(branch, way=8)])
    fixes = ([(30.0 + 10.0 * i, 1.0) for i in range(18)] + [(201.0, 10.0), (201.0, 18.0)]
             + [(201.0, 18.0 + 0.01 * i) for i in range(30)] + [(201.0, 10.0)]
             + [(200.0 - 10.0 * i, 1.0) for i in range(1, 18)])
    out = []
    # stand_commit_wait off: with it one commit holds the whole excursion, and the stand
    # at its end (8 m from the branch's middle shape point, within eps) is committed at
    # that shape point (docs/measured.md, "Session 9 (fleet1hz)")
    for settings in (MatchSettings(stand_commit_wait=False),
                     MatchSettings(stand_loops=False, stand_commit_wait=False)):
        tracker = Tracker(net, "van9", settings)
        events = [e for i, (x, y) in enumerate(fixes)
                  for e in tracker.update(Fix("van9", float(i), 0.0, 0.0, x, y, 5.0))]
        out.append([e for e in events + tracker.flush() if isinstance(e, Commit)])
    assert out[0] == out[1]
    assert 8 in _ways(net, out[0])


def test_tracker_stand_loops_survives_a_restore() -> None:
    """The rule reads only the tree and the fixes a tracker keeps: a tracker written and
    read back in the middle of the stand commits exactly what one that never stopped does."""
    net = _network()
    straight = Tracker(net, "van9")
    restored = Tracker(net, "van9")
    cut = STAND_FIRST + 30
    first = [e for i, (x, y) in enumerate(FIXES[:cut])
             for e in straight.update(Fix("van9", float(i), 0.0, 0.0, x, y, 5.0))]
    assert [e for i, (x, y) in enumerate(FIXES[:cut])
            for e in restored.update(Fix("van9", float(i), 0.0, 0.0, x, y, 5.0))] == first
    restored = Tracker.from_bytes(net, None, restored.to_bytes())
    rest = [Fix("van9", float(i), 0.0, 0.0, x, y, 5.0)
            for i, (x, y) in enumerate(FIXES) if i >= cut]
    assert [e for f in rest for e in restored.update(f)] == [e for f in rest
                                                             for e in straight.update(f)]
    assert restored.flush() == straight.flush()


def test_tracker_stand_commit_wait_waits_until_after_a_stand() -> None:
    """With stand_commit_wait, candidates that agree while the vehicle stands are
    committed only once it has moved off for 10 s (so that one commit holds any loop made
    during the stand); the settled answers are the same here, where the van stands 30 s
    mid-road and drives on, and by default the stand is committed as it goes."""
    road = [(float(x), 0.0) for x in range(0, 605, 5)]
    net = network_from_roads([Road(road, way=7)])
    fixes = ([(30.0 + 10.0 * i, 2.0) for i in range(18)] + [(200.0, 2.0)] * 30
             + [(200.0 + 10.0 * i, 2.0) for i in range(1, 30)])
    emitted = []
    for settings in (MatchSettings(stand_commit_wait=True), MatchSettings(stand_commit_wait=False)):
        tracker = Tracker(net, "van9", settings)
        at: list[int] = []
        done: list[Commit] = []
        for i, (x, y) in enumerate(fixes):
            new = [e for e in tracker.update(Fix("van9", float(i), 0.0, 0.0, x, y, 5.0))
                   if isinstance(e, Commit)]
            at += [i] * len(new)
            done += new
        emitted.append((at, _settled(done + [e for e in tracker.flush()
                                              if isinstance(e, Commit)])))
    # the stand: fixes 18-47 (the van stands from fix 17); it has stood 10 s from fix 27
    assert not [i for i in emitted[0][0] if 28 <= i <= 57]
    assert [i for i in emitted[1][0] if 28 <= i <= 57]
    assert emitted[0][1] == emitted[1][1]
