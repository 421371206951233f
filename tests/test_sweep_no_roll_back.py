"""``no_roll_back``: a candidate that stays on its segment is not reported behind its parent.

Outside reference: shapely places each final answer on the road line and measures it
against its fix (within eps) and along the line (``project``, the answers' order).
"""

from __future__ import annotations

import numpy as np
import pytest
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.settings import MatchSettings
from livematch.core.sweep import StepContext
from livematch.core.view import view_of
from tests.catalogue import committed_path, final_answers, path_line, track_points

# one long two-way street east (segments 300 m long: a fix's projection wanders within
# a segment for minutes), a side street north at the middle
MAIN = [(0.0, 0.0), (300.0, 0.0), (600.0, 0.0)]
SIDE = [(300.0, 0.0), (300.0, 300.0)]
NET = network_from_roads([Road(MAIN, way=1, name="Main"), Road(SIDE, way=2, name="Side")])
EPS = 15.0
LINE = shapely.LineString(MAIN)
ON = MatchSettings(no_roll_back=True)
OFF = MatchSettings()


def slow_drive(seed: int) -> list[tuple[float, float]]:
    """A van creeping east along Main at 1.5 m/s, a fix every second, 4 m white error
    per axis (common practice for a test of the sweep's reported position: the
    along-road error per step is larger than the step driven)."""
    rng = np.random.default_rng(seed)
    return [(20.0 + 1.5 * i + rng.normal(0.0, 4.0), rng.normal(0.0, 4.0))
            for i in range(150)]


def along(answers: dict[float, tuple[int, float, float, float]]) -> list[tuple[int, float]]:
    """Each final answer in time order: its segment and its distance along Main (shapely)."""
    return [(a[0], LINE.project(shapely.Point(a[2], a[3]))) for _, a in sorted(answers.items())]


def back_steps(rows: list[tuple[int, float]], pts: list[tuple[float, float]],
               lo: int, hi: int) -> int:
    """Fixes ``lo`` .. ``hi`` answered on the segment of the fix before, behind its answer
    (> 1 mm), other than at the far edge of the fix's eps disc (the parent's position
    lies past the reachable part: the answer is its top)."""
    count = 0
    for i in range(lo, hi + 1):
        (s0, d0), (s1, d1) = rows[i - 1], rows[i]
        edge = abs(LINE.interpolate(d1).distance(shapely.Point(pts[i])) - EPS) < 1e-6
        count += s0 == s1 and d1 < d0 - 1e-3 and not edge
    return count


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_answers_do_not_roll_back_along_a_segment(seed: int) -> None:
    """Away from the log's start and end (the start and end rules place those answers),
    every final answer on the segment of the one before lies no farther back along the
    road; without the rule dozens do."""
    pts = slow_drive(seed)
    off_events = track_points(NET, OFF, pts)
    off = final_answers(off_events)
    on_events = track_points(NET, ON, pts)
    on = final_answers(on_events)
    # the case the rule is for: without it the reported point goes back along the
    # road between consecutive fixes
    assert back_steps(along(off), pts, 20, 130) > 20
    assert back_steps(along(on), pts, 20, 130) == 0
    # every answer on Main (shapely distance 0) and within eps of its fix (shapely)
    for i, (fx, fy) in enumerate(pts):
        _, _, x, y = on[float(i)]
        point = shapely.Point(x, y)
        assert LINE.distance(point) <= 1e-9
        assert point.distance(shapely.Point(fx, fy)) <= EPS + 1e-9
    # the committed path lies on Main (shapely), as without the rule
    for events in (on_events, off_events):
        assert path_line(NET, committed_path(events)).within(LINE.buffer(1e-6))


def test_slack_allows_that_much_roll_back() -> None:
    """With ``roll_back_slack_m`` an answer may lie up to that many metres behind the one
    before on the same segment (away from the log's ends and the eps edge), no more."""
    pts = slow_drive(1)
    slack = 2.0
    rows = along(final_answers(track_points(
        NET, MatchSettings(no_roll_back=True, roll_back_slack_m=slack), pts)))
    worst = max(rows[i - 1][1] - rows[i][1] for i in range(20, 131)
                if rows[i - 1][0] == rows[i][0])
    assert worst <= slack + 1e-6
    assert worst > 0.0


def test_rule_off_by_default_and_validated() -> None:
    assert MatchSettings().no_roll_back is False
    assert MatchSettings().roll_back_slack_m == 0.0
    assert ("roll_back_slack_m" in dict(MatchSettings(roll_back_slack_m=-1.0).problems()))
    assert ("no_roll_back" in dict(MatchSettings(no_roll_back=1).problems()))  # type: ignore[arg-type]
    ctx = StepContext.between(view_of(NET), ON, EPS, 0.0, 0.0, 1.0, 0.0, 1, 1.0)
    assert ctx.roll_back == 0.0
    assert StepContext.between(view_of(NET), OFF, EPS, 0.0, 0.0, 1.0, 0.0, 1, 1.0).roll_back < 0.0
