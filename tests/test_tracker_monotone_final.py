"""``monotone_final``: a commit's final answers never go back along the committed path.

Outside reference: shapely places each answer against the true position (distance) and
on its own segment (distance 0), and reads distances along the straight road
(``project``).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import shapely

from livematch.core.events import Commit
from livematch.core.settings import MatchSettings
from tests.catalogue import (
    committed_path,
    dead_end,
    final_answers,
    polyline_points,
    straight_road,
    track_points,
)

ON = MatchSettings(monotone_final=True)
POOL = MatchSettings(monotone_final=True, monotone_pool=True)
OFF = MatchSettings()
ROAD = shapely.LineString([(0.0, 0.0), (1000.0, 0.0)])


def stand_drive(seed: int) -> tuple[list[tuple[float, float]], list[tuple[float, float]]]:
    """True positions and fixes (1 Hz): east along the road at 10 m/s from 100 m to 475 m,
    90 s standing there, then on to 900 m; 4 m white error per axis (common practice for a
    test of reported positions: a standing vehicle's fixes scatter a few metres)."""
    truth = polyline_points([(100.0, 0.0), (475.0, 0.0)], 10.0)
    truth += [(475.0, 0.0)] * 90
    truth += polyline_points([(475.0, 0.0), (900.0, 0.0)], 10.0)[1:]
    rng = np.random.default_rng(seed)
    noise = rng.normal(0.0, 4.0, size=(len(truth), 2))
    fixes = [(x + dx, y + dy) for (x, y), (dx, dy) in zip(truth, noise, strict=True)]
    return truth, fixes


def _along(answers: dict[float, tuple[int, float, float, float]]) -> list[float]:
    """Each final answer's distance along the straight road, in time order (shapely)."""
    return [ROAD.project(shapely.Point(answers[t][2], answers[t][3])) for t in sorted(answers)]


def _stand_error(answers: dict[float, tuple[int, float, float, float]],
                 truth: list[tuple[float, float]]) -> float:
    """Mean distance (shapely) from the final answers of the standing fixes to the truth."""
    stand = [i for i, p in enumerate(truth) if p == (475.0, 0.0)]
    return float(np.mean([shapely.Point(answers[float(i)][2:]).distance(
        shapely.Point(truth[i])) for i in stand]))


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_monotone_final_standing_vehicle_answers_never_go_back(seed: int) -> None:
    """Along the straight road the final answers never go back (1 mm) with the key,
    where without it they do by metres; the road of every answer and the path are those
    without the key."""
    _, pts = stand_drive(seed)
    on_events = track_points(straight_road(), ON, pts)
    off_events = track_points(straight_road(), OFF, pts)
    on, off = final_answers(on_events), final_answers(off_events)
    assert sorted(on) == sorted(off) == [float(i) for i in range(len(pts))]
    assert all(b >= a - 1e-3 for a, b in itertools.pairwise(_along(on)))
    assert any(b < a - 1.0 for a, b in itertools.pairwise(_along(off)))
    assert [on[t][0] for t in sorted(on)] == [off[t][0] for t in sorted(off)]
    assert committed_path(on_events) == committed_path(off_events)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_monotone_pool_standing_vehicle_answers_nearer_the_truth(seed: int) -> None:
    """With ``monotone_pool`` the answers through the stand lie nearer the true position
    on average than without the rule (pooled across the commits of one or two fixes a
    1 Hz stand is committed in), each commit's answers never go back, and the roads
    and path are those without the rule."""
    truth, pts = stand_drive(seed)
    on_events = track_points(straight_road(), POOL, pts)
    off_events = track_points(straight_road(), OFF, pts)
    on, off = final_answers(on_events), final_answers(off_events)
    assert _stand_error(on, truth) < _stand_error(off, truth)
    for e in on_events:
        if isinstance(e, Commit):
            along = [ROAD.project(shapely.Point(f.x, f.y)) for f in e.fixes]  # shapely
            assert all(b >= a - 1e-3 for a, b in itertools.pairwise(along))
    assert [on[t][0] for t in sorted(on)] == [off[t][0] for t in sorted(off)]
    assert committed_path(on_events) == committed_path(off_events)


#: the fix of :func:`uturn_gap_drive` after its gap
GAP_AT = 110


def uturn_gap_drive(seed: int) -> list[tuple[float, float]]:
    """Fixes (3 m white error) every second at 8 m/s: east along the main road, up the
    cul-de-sac to its end, a U-turn there and back down, then east, with 20 fixes left
    out before fix ``GAP_AT`` (a gap the tracker bridges: 21 s, more than ``gap_s``)."""
    route = [(300.0, 0.0), (500.0, 0.0), (500.0, 300.0), (500.0, 0.0), (1000.0, 0.0)]
    pts = polyline_points(route, 8.0)
    assert pts[GAP_AT][1] == 0.0 and pts[GAP_AT][0] > 520.0  # on the main road, past the spur
    pts = pts[:GAP_AT] + pts[GAP_AT + 20:]
    rng = np.random.default_rng(seed)
    noise = rng.normal(0.0, 3.0, size=(len(pts), 2))
    return [(x + dx, y + dy) for (x, y), (dx, dy) in zip(pts, noise, strict=True)]


def gapped(pts: list[tuple[float, float]], gap_at: int, gap_s: float) -> list[float]:
    """Fix times: 1 s apart, with ``gap_s`` seconds before fix ``gap_at``."""
    return [float(i) + (gap_s if i >= gap_at else 0.0) for i in range(len(pts))]


@pytest.mark.parametrize("settings", [ON, POOL])
@pytest.mark.parametrize("seed", [4, 5])
def test_monotone_final_keeps_road_decisions_through_uturn_and_gap(
        seed: int, settings: MatchSettings) -> None:
    """Up a cul-de-sac, a U-turn at its end and back, then a 21 s gap: every final
    answer's segment and the committed path are those without the key; only offsets
    and points move, and every moved point lies on its own segment (shapely)."""
    net = dead_end()
    pts = uturn_gap_drive(seed)
    runs = {}
    for name, each in (("on", settings), ("off", OFF)):
        events = _track_timed(net, each, pts, gap_at=GAP_AT, gap_s=20.0)
        runs[name] = (final_answers(events), committed_path(events))
    (on, on_path), (off, off_path) = runs["on"], runs["off"]
    assert on_path == off_path
    assert sorted(on) == sorted(off)
    assert [on[t][0] for t in sorted(on)] == [off[t][0] for t in sorted(off)]
    ways = {int(net.seg_way[s]) for s in on_path}
    assert ways == {1, 2}  # the drive did go up the cul-de-sac and back
    moved = [t for t in on if on[t][1] != off[t][1]]
    assert moved
    xy = net.node_xy
    for t in moved:
        seg, offset, x, y = on[t]
        line = shapely.LineString([xy[net.seg_from[seg]], xy[net.seg_to[seg]]])
        assert 0.0 <= offset <= line.length + 1e-9
        assert line.distance(shapely.Point(x, y)) <= 1e-6  # shapely
        assert abs(line.project(shapely.Point(x, y)) - offset) <= 1e-6  # shapely


def _track_timed(net: object, settings: MatchSettings, pts: list[tuple[float, float]],
                 gap_at: int, gap_s: float, restore_at: int | None = None) -> list[object]:
    """As ``track_points``, with the fix times of :func:`gapped`."""
    from livematch.core.fix import Fix
    from livematch.core.tracker import Tracker

    tracker = Tracker(net, "v", settings)  # type: ignore[arg-type]
    events: list[object] = []
    for i, ((x, y), t) in enumerate(zip(pts, gapped(pts, gap_at, gap_s), strict=True)):
        if i == restore_at:
            tracker = Tracker.from_bytes(net, settings, tracker.to_bytes())  # type: ignore[arg-type]
        events += tracker.update(Fix("v", t, 0.0, 0.0, x, y))
    return events + tracker.flush()


@pytest.mark.parametrize("settings", [ON, POOL])
@pytest.mark.parametrize("restore_at", [30, 95, 150])
def test_monotone_final_survives_a_checkpoint(restore_at: int, settings: MatchSettings) -> None:
    """Checkpointed and restored mid-trip (after commits: the bound, or the pooled block,
    is in the state), the tracker gives the events of an uninterrupted run, on both
    drives."""
    _, pts = stand_drive(7)
    net = straight_road()
    whole = track_points(net, settings, pts)
    assert track_points(net, settings, pts, restore_at=restore_at) == whole
    pts = uturn_gap_drive(8)
    whole = _track_timed(dead_end(), settings, pts, GAP_AT, 20.0)
    assert _track_timed(dead_end(), settings, pts, GAP_AT, 20.0,
                        restore_at=restore_at) == whole


def test_monotone_final_state_carries_the_bound() -> None:
    """After a commit the state holds the last answer under ``along`` (only with the key),
    and a restored tracker has it back."""
    from livematch.core.fix import Fix
    from livematch.core.tracker import Tracker

    _, pts = stand_drive(7)
    net = straight_road()
    on, off = Tracker(net, "v", ON), Tracker(net, "v", OFF)
    for i, (x, y) in enumerate(pts[:120]):
        on.update(Fix("v", float(i), 0.0, 0.0, x, y))
        off.update(Fix("v", float(i), 0.0, 0.0, x, y))
    assert on.along_last is not None and b'"along"' in on.to_bytes()
    assert off.along_last is None and b'"along"' not in off.to_bytes()
    restored = Tracker.from_bytes(net, ON, on.to_bytes())
    assert restored.along_last == on.along_last


def test_monotone_final_off_by_default_and_validated() -> None:
    """Off unless set; a value other than true or false is refused."""
    assert MatchSettings().monotone_final is False
    assert MatchSettings().monotone_pool is False
    assert "monotone_final" in dict(MatchSettings(monotone_final=1).problems())  # type: ignore[arg-type]
    assert "monotone_pool" in dict(MatchSettings(monotone_pool="yes").problems())  # type: ignore[arg-type]
    assert not POOL.problems()
