"""``smallest_agrees``: a larger level leaves an agreed commit to a smaller covering level.

Outside reference: shapely measures each final answer against its fix (the smallest eps
level's certificate, 15 m) and tells which roads the committed path holds.
"""

from __future__ import annotations

import numpy as np
import pytest
import shapely

import livematch.core.tracker as tracker_module
from livematch.core.build import Road, network_from_roads
from livematch.core.events import Assignment, Event, HeldAssignment
from livematch.core.fix import Fix
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from tests.catalogue import (
    committed_path,
    final_answers,
    grid,
    polyline_points,
    track_points,
)

# a main road east; at (100, 0) a 27 m street north whose end (100, 27) is a junction
# with a service road east: the van drives up the short street, turns round at its end,
# comes back, stands at the main road and drives on east (the service road never driven)
NET = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0), (300.0, 0.0)], way=1),
                          Road([(100.0, 0.0), (100.0, 27.0)], way=2),
                          Road([(100.0, 27.0), (200.0, 27.0)], way=3)])
SMALLEST_EPS = 15.0  # MatchSettings' default ladder (15, 30, 60)
ON = MatchSettings(smallest_agrees=True)
OFF = MatchSettings(smallest_agrees=False)
SEEDS = range(36, 60)


def service_segment() -> int:
    xy = NET.node_xy.tolist()
    for s in range(NET.n_segments):
        if xy[NET.seg_from[s]] == [100.0, 27.0] and xy[NET.seg_to[s]] == [200.0, 27.0]:
            return s
    raise LookupError("service road")


def trace(seed: int) -> list[tuple[float, float]]:
    """The drive above, a fix every second, with first-order autoregressive error
    (coefficient 0.95 per second, innovation 1.6 m per axis: about 5 m standard
    deviation, common practice for a GNSS error that leans for tens of seconds)."""
    rng = np.random.default_rng(seed)
    pts = polyline_points([(0.0, 0.0), (100.0, 0.0), (100.0, 27.0)], 5.0)
    pts += [(100.0, 27.0)] * 3
    pts += polyline_points([(100.0, 27.0), (100.0, 0.0)], 5.0)
    pts += [(100.0, 0.0)] * 8
    pts += polyline_points([(100.0, 0.0), (300.0, 0.0)], 6.0)
    ex = ey = 0.0
    out = []
    for x, y in pts:
        ex = 0.95 * ex + rng.normal(0.0, 1.6)
        ey = 0.95 * ey + rng.normal(0.0, 1.6)
        out.append((x + ex, y + ey))
    return out


def far_answers(pts: list[tuple[float, float]], settings: MatchSettings) -> tuple[int, bool]:
    """Final answers farther than the smallest eps from their fix (shapely), and whether
    the committed path drives the service road."""
    events = track_points(NET, settings, pts)
    answers = final_answers(events)
    far = sum(1 for i, (x, y) in enumerate(pts)
              if shapely.Point(answers[float(i)][2:]).distance(shapely.Point(x, y))
              > SMALLEST_EPS)
    return far, service_segment() in committed_path(events)


def test_the_smallest_level_settles_the_turn_round() -> None:
    off = {seed: far_answers(trace(seed), OFF) for seed in SEEDS}
    on = {seed: far_answers(trace(seed), ON) for seed in SEEDS}
    # the case: without the rule a larger level settles fixes more than 15 m from them,
    # on a lineage that never turned round, and the path takes the service road
    assert sum(far for far, _ in off.values()) >= 50
    assert sum(svc for _, svc in off.values()) >= 5
    # with it: never the service road, and no seed has more answers beyond 15 m
    assert not any(svc for _, svc in on.values())
    assert all(on[seed][0] <= off[seed][0] for seed in SEEDS)
    assert 10 * sum(far for far, _ in on.values()) < sum(far for far, _ in off.values())


@pytest.mark.parametrize("seed", [36, 37])
def test_no_change_where_the_levels_agree(seed: int) -> None:
    """Seeds where every level's commit stays within 15 m: the same events either way."""
    pts = trace(seed)
    assert track_points(NET, ON, pts) == track_points(NET, OFF, pts)


def live(events: list[Event]) -> list[Event]:
    return [e for e in events if isinstance(e, (Assignment, HeldAssignment))]


def test_live_answers_as_without_the_rule() -> None:
    """The rule moves final answers only: every seed's live answers are the same with
    the key on and off, while the final answers differ in several seeds."""
    changed = 0
    for seed in SEEDS:
        pts = trace(seed)
        on, off = track_points(NET, ON, pts), track_points(NET, OFF, pts)
        assert live(on) == live(off), seed
        changed += final_answers(on) != final_answers(off)
    assert changed >= 5


def test_checkpoint_mid_deferral_continues_exactly() -> None:
    """Checkpointed and restored at every fix of a seed the rule changes, the events are
    those of the tracker that ran through; some checkpoints hold a deferred commit
    (``agreed_seq`` ahead of ``next_commit``), so the field's round trip is exercised."""
    deferred = 0
    for seed in SEEDS:
        pts = trace(seed)
        whole = track_points(NET, ON, pts)
        if final_answers(whole) == final_answers(track_points(NET, OFF, pts)):
            continue
        tracker = Tracker(NET, "v", ON)
        for i, (x, y) in enumerate(pts):
            tracker = Tracker.from_bytes(NET, ON, tracker.to_bytes())
            deferred += tracker.agreed_seq >= tracker.next_commit
            tracker.update(Fix("v", float(i), 0.0, 0.0, x, y))
        for k in range(3, len(pts), 4):
            assert track_points(NET, ON, pts, restore_at=k) == whole, (seed, k)
    assert deferred >= 3


GRID = grid(5, 200.0, 50.0)


def sparse_trace(seed: int, dt: float) -> list[tuple[float, float]]:
    """A drive round the catalogue's grid at 10 m/s, a fix every ``dt`` seconds, with
    first-order autoregressive error (coefficient 0.7 a fix, innovation 6 m per axis)."""
    rng = np.random.default_rng(seed)
    route = [(0.0, 0.0), (400.0, 0.0), (400.0, 200.0), (200.0, 200.0), (200.0, 600.0),
             (800.0, 600.0), (800.0, 200.0), (600.0, 200.0), (600.0, 800.0)]
    ex = ey = 0.0
    out = []
    for x, y in polyline_points(route, 10.0 * dt):
        ex = 0.7 * ex + rng.normal(0.0, 6.0)
        ey = 0.7 * ey + rng.normal(0.0, 6.0)
        out.append((x + ex, y + ey))
    return out


@pytest.mark.pure_python  # lifts a Final constant (inlined when compiled)
@pytest.mark.parametrize("dt", [15.0, 30.0])
def test_sparse_logs_unchanged(dt: float, monkeypatch: pytest.MonkeyPatch) -> None:
    """At 15 and 30 s between fixes the rule does not act: the same events with the key
    on and off. Not by chance: with the bound on the step (``SPARSE_S``) lifted, some
    of the same logs do change."""
    seeds = range(20)
    for seed in seeds:
        pts = sparse_trace(seed, dt)
        assert track_points(GRID, ON, pts, dt) == track_points(GRID, OFF, pts, dt), seed
    monkeypatch.setattr(tracker_module, "SPARSE_S", 100.0)
    assert any(track_points(GRID, ON, sparse_trace(seed, dt), dt)
               != track_points(GRID, OFF, sparse_trace(seed, dt), dt) for seed in seeds)


def test_smallest_agrees_validation() -> None:
    assert MatchSettings().smallest_agrees is True  # on by default since session 21
    assert ("smallest_agrees", "must be true or false, got 1") in MatchSettings(
        smallest_agrees=1).problems()  # type: ignore[arg-type]
    assert ON.problems() == []
