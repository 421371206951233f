"""``smallest_agrees``: a larger level leaves an agreed commit to a smaller covering level.

Outside reference: shapely measures each final answer against its fix (the smallest eps
level's certificate, 15 m) and tells which roads the committed path holds.
"""

from __future__ import annotations

import numpy as np
import pytest
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.settings import MatchSettings
from tests.catalogue import committed_path, final_answers, polyline_points, track_points

# a main road east; at (100, 0) a 27 m street north whose end (100, 27) is a junction
# with a service road east: the van drives up the short street, turns round at its end,
# comes back, stands at the main road and drives on east (the service road never driven)
NET = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0), (300.0, 0.0)], way=1),
                          Road([(100.0, 0.0), (100.0, 27.0)], way=2),
                          Road([(100.0, 27.0), (200.0, 27.0)], way=3)])
SMALLEST_EPS = 15.0  # MatchSettings' default ladder (15, 30, 60)
ON = MatchSettings(smallest_agrees=True)
OFF = MatchSettings()
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


def test_smallest_agrees_validation() -> None:
    assert MatchSettings().smallest_agrees is False
    assert ("smallest_agrees", "must be true or false, got 1") in MatchSettings(
        smallest_agrees=1).problems()  # type: ignore[arg-type]
    assert ON.problems() == []
