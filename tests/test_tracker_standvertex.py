"""Where a stand is committed (stand_loops_outer), answers at a vertex (vertex_in_segment)
and the fix-count lag inside stand_commit_wait's window, through Tracker.update."""

from __future__ import annotations

import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Assignment, Commit, Event
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.errors import BadConfigError
from livematch.pipeline import matcher_settings_from_mapping

shapely = pytest.importorskip("shapely")

# A two-way road west-east with a shape point every 5 m, one more at x = 200 and a
# junction at x = 203 where a 5 m dead-end stub leaves north. A van drives east at
# 10 m/s, stands at x = 200 (a mid-road shape point) for 60 s while the GNSS error leans
# towards the stub (0.2 m/s up to 3 m east and 4 m north, then held: correlated error),
# then turns round there and leaves west at 10 m/s.
STAND_FIRST, STAND_LAST = 17, 77  # fix indices of the stand
FIXES = ([(30.0 + 10.0 * i, 1.0) for i in range(18)]
         + [(200.0 + min(3.0, 0.2 * i), 1.0 + min(4.0, 0.2 * i)) for i in range(1, 61)]
         + [(200.0 - 10.0 * i, 1.0) for i in range(1, 18)])
# what the van drove: east to x = 200 and back
DRIVEN = [(30.0, 0.0), (200.0, 0.0)]


def _network() -> RoadNetwork:
    road = ([(float(x), 0.0) for x in range(0, 200, 5)] + [(200.0, 0.0), (203.0, 0.0)]
            + [(float(x), 0.0) for x in range(205, 405, 5)])
    return network_from_roads([Road(road, way=7), Road([(203.0, 0.0), (203.0, 5.0)], way=8)])


def _run(net: RoadNetwork, settings: MatchSettings,
         fixes: list[tuple[float, float]]) -> tuple[list[Event], list[int]]:
    """Every event, and for each commit the index of the fix whose update emitted it."""
    tracker = Tracker(net, "van3", settings)
    events: list[Event] = []
    at: list[int] = []
    for i, (x, y) in enumerate(fixes):
        new = tracker.update(Fix("van3", float(i), 0.0, 0.0, x, y, 5.0))
        at += [i for e in new if isinstance(e, Commit)]
        events += new
    return events + tracker.flush(), at


def _segment_line(net: RoadNetwork, seg: int) -> shapely.LineString:
    a = net.node_xy[net.seg_from[seg]]
    b = net.node_xy[net.seg_to[seg]]
    return shapely.LineString([(float(a[0]), float(a[1])), (float(b[0]), float(b[1]))])


def test_stand_loops_outer_commits_the_stand_on_road_driven() -> None:
    """With the outermost loop first (default), every fix of the stand is committed on a
    segment of the road the van drove (shapely: the segment lies within the driven line),
    and the committed path goes no further east than x = 200; the innermost loop first
    commits the stand at the junction, on the segment 200 -> 203 the van never drove."""
    net = _network()
    driven = shapely.LineString(DRIVEN).buffer(1e-6)
    for outer in (True, False):
        events, _ = _run(net, MatchSettings(stand_loops_outer=outer), FIXES)
        settled = [f for e in events if isinstance(e, Commit) for f in e.fixes]
        assert [f.t for f in settled] == [float(i) for i in range(len(FIXES))]
        stand = settled[STAND_FIRST + 1:STAND_LAST + 1]
        on_driven = [driven.contains(_segment_line(net, f.segment)) for f in stand]
        path_x = max(float(net.node_xy[net.seg_to[s], 0])
                     for e in events if isinstance(e, Commit) for s in e.path)
        if outer:
            assert all(on_driven)
            assert path_x <= 200.0
        else:
            assert not any(on_driven)
            assert path_x == pytest.approx(203.0)


def test_stand_loops_outer_keeps_the_certificate() -> None:
    """The committed path lies within Fréchet distance 15 m (the smallest eps, which never
    dies here) of the fixes: shapely's frechet_distance of the densified curves (a
    discrete distance, an upper bound of the continuous one)."""
    net = _network()
    events, _ = _run(net, MatchSettings(), FIXES)
    commits = [e for e in events if isinstance(e, Commit)]
    settled = [f for c in commits for f in c.fixes]
    path = [s for c in commits for s in c.path]
    points = [(settled[0].x, settled[0].y)]
    for s in path[1:]:
        points.append(tuple(float(v) for v in net.node_xy[net.seg_from[s]]))
    points.append((settled[-1].x, settled[-1].y))
    # densify 0.1: GEOS's discrete Fréchet took minutes at 0.05-0.07
    assert shapely.frechet_distance(shapely.LineString(FIXES), shapely.LineString(points),
                                    densify=0.1) <= 15.0


def test_vertex_in_segment_reports_the_segment_come_in_by() -> None:
    """Fixes that lie exactly on shape points give answers at the very start of a segment;
    with vertex_in_segment (default) each is reported at the end of the segment before it
    instead: the same point (shapely's interpolate along both segments), and only the
    first fix of a stretch keeps offset 0."""
    road = [(float(x), 0.0) for x in range(0, 405, 5)]
    net = network_from_roads([Road(road, way=7)])
    fixes = [(30.0 + 10.0 * i, 0.0) for i in range(30)]
    old, _ = _run(net, MatchSettings(vertex_in_segment=False), fixes)
    new, _ = _run(net, MatchSettings(), fixes)

    def answers(events: list[Event]) -> list[tuple[float, int, float, float, float]]:
        out = [(e.t, e.segment, e.offset_m, e.x, e.y) for e in events
               if isinstance(e, Assignment)]
        return out + [(f.t, f.segment, f.offset_m, f.x, f.y) for e in events
                      if isinstance(e, Commit) for f in e.fixes]

    before, after = answers(old), answers(new)
    assert len(before) == len(after) == 2 * len(fixes)
    assert sum(a[2] == 0.0 for a in before) >= 20
    assert all(a[0] == 0.0 for a in after if a[2] == 0.0)  # the stretch's first fix
    changed = 0
    for b, a in zip(before, after, strict=True):
        assert (a[0], a[3], a[4]) == (b[0], b[3], b[4])
        for seg, offset in ((a[1], a[2]), (b[1], b[2])):
            point = _segment_line(net, seg).interpolate(offset)
            assert (point.x, point.y) == pytest.approx((a[3], a[4]), abs=1e-9)
        if a[1] != b[1]:
            changed += 1
            assert int(net.seg_to[a[1]]) == int(net.seg_from[b[1]])
            assert a[2] == pytest.approx(float(net.seg_len[a[1]]))
    assert changed == sum(b[2] == 0.0 for b in before) - sum(a[2] == 0.0 for a in after)


def test_stand_commit_wait_holds_the_fix_count_lag_too() -> None:
    """With max_lag_fixes 20, a van that stands 40 s and drives on: by default
    (stand_commit_wait) no commit is made from the stand until 10 s after it, neither an
    agreed one nor one forced by the fix count (stand_wait holds that one too, for a
    window of its own that may close first); without it the stand is committed as soon
    as the van drives on."""
    road = [(float(x), 0.0) for x in range(0, 805, 5)]
    net = network_from_roads([Road(road, way=7)])
    fixes = ([(30.0 + 10.0 * i, 2.0) for i in range(18)] + [(200.0, 2.0)] * 40
             + [(200.0 + 10.0 * i, 2.0) for i in range(1, 40)])
    _, waited = _run(net, MatchSettings(max_lag_fixes=20), fixes)
    _, plain = _run(net, MatchSettings(max_lag_fixes=20, stand_commit_wait=False), fixes)
    # the stand: fixes 18-57; it has stood 10 s from fix 27, 10 s after it ends at 67
    assert not [i for i in waited if 28 <= i <= 67]
    assert [i for i in plain if 58 <= i <= 67]


def test_new_matcher_keys_are_validated() -> None:
    """The two keys are booleans in [matcher]; anything else is refused by name."""
    settings = matcher_settings_from_mapping(
        {"stand_loops_outer": False, "vertex_in_segment": False}, "a.toml")
    assert (settings.stand_loops_outer, settings.vertex_in_segment) == (False, False)
    for key in ("stand_loops_outer", "vertex_in_segment"):
        assert [k for k, _ in MatchSettings(**{key: 1}).problems()] == [key]
        with pytest.raises(BadConfigError, match=f"matcher.{key}"):
            matcher_settings_from_mapping({key: "yes"}, "a.toml")
