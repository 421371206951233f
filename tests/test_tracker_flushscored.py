"""Rule ``flush_scored``: the end-of-log flush ranks its candidates by live score at dense fixes.

The plain case: a main road east along y = 0 and a side road that forks off it at
x = 200 and runs 6 m north of it. The vehicle drives the main road at 10 m/s, one fix a
second, and its GNSS error leans 6 m north the whole time (the correlated error of
``bench/accuracy.py``'s drives leans one way for tens of seconds). The log ends 15 fixes
past the fork, before the candidates on the two roads could agree, so the flush decides.
"""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from scipy.stats import multivariate_normal

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit, Event
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from tests.catalogue import final_answers, track_points

LEAN_M = 6.0
MAIN, SIDE = 1, 2
SIGMA_M, TAU_S = 5.0, 30.0


def _fork() -> RoadNetwork:
    main = Road([(float(x), 0.0) for x in range(0, 601, 50)], way=MAIN, name="Main")
    side = Road([(200.0, 0.0), (215.0, LEAN_M)]
                + [(float(x), LEAN_M) for x in range(250, 601, 50)], way=SIDE, name="Side")
    return network_from_roads([main, side])


def _pts(n: int = 36, step: float = 10.0) -> list[tuple[float, float]]:
    return [(step * i, LEAN_M) for i in range(n)]


def _ways(net: RoadNetwork, events: list[Event]) -> list[int]:
    answers = final_answers(events)
    return [int(net.seg_way[answers[t][0]]) for t in sorted(answers)]


def _log_density(offsets: np.ndarray, times: np.ndarray, correlated: bool) -> float:
    """Log density of the per-axis offsets under zero-mean Gaussian error, sigma 5 m:
    first-order Gauss-Markov (covariance sigma^2 exp(-|dt| / tau)) or independent."""
    lag = np.abs(times[:, None] - times[None, :])
    cov = SIGMA_M ** 2 * (np.exp(-lag / TAU_S) if correlated else np.eye(len(times)))
    return float(sum(multivariate_normal(mean=np.zeros(len(times)), cov=cov).logpdf(offsets[:, k])
                     for k in range(2)))


def test_flush_scored_commits_the_main_road_that_the_lean_runs_along() -> None:
    """Off, the flush commits the fixes past the fork on the side road the error leans onto;
    on, every final answer and the whole committed path lie on the main road, each answer
    within eps of its fix."""
    net = _fork()
    pts = _pts()
    off = track_points(net, MatchSettings(), pts)
    on = track_points(net, MatchSettings(flush_scored=True), pts)
    assert _ways(net, off)[-10:] == [SIDE] * 10  # the failure the rule mends
    assert _ways(net, on) == [MAIN] * len(pts)
    main_line = shapely.LineString([(0.0, 0.0), (600.0, 0.0)])  # shapely: outside the core
    answers = final_answers(on)
    for i, t in enumerate(sorted(answers)):
        _, _, x, y = answers[t]
        assert main_line.distance(shapely.Point(x, y)) < 1e-9
        assert np.hypot(x - pts[i][0], y - pts[i][1]) <= 15.0 + 1e-9
    path = [s for e in on if isinstance(e, Commit) for s in e.path]
    assert {int(net.seg_way[s]) for s in path} == {MAIN}


def test_flush_scored_answer_is_the_likelier_under_correlated_error() -> None:
    """Outside check (scipy's multivariate normal density): with the error modelled as
    first-order Gauss-Markov (the bench's model, Ranacher et al. 2016: a time constant of
    tens of seconds; 30 s is the tracker's error_tau_s), the offsets of the rule's answers
    from the fixes are the likelier; with the error taken as independent from fix to fix
    (what the path cost assumes) the side road's are. The rule follows the former."""
    net = _fork()
    pts = _pts()
    times = np.arange(len(pts), dtype=float)
    fixes = np.array(pts)
    dens = {}
    for on in (False, True):
        answers = final_answers(track_points(net, MatchSettings(flush_scored=on), pts))
        matched = np.array([answers[t][2:] for t in sorted(answers)])
        offsets = fixes - matched
        dens[on] = (_log_density(offsets, times, True), _log_density(offsets, times, False))
    assert dens[True][0] > dens[False][0]  # correlated: the main road
    assert dens[False][1] > dens[True][1]  # independent: the side road


def test_flush_scored_leaves_sparse_fixes_and_the_commits_before_the_flush() -> None:
    """At 5 s between fixes the flush ranks by path cost as before (the median step is not
    below 5 s); at 1 s every event before the flush is the same with the rule on or off."""
    net = _fork()
    sparse = _pts(n=8, step=50.0)
    assert track_points(net, MatchSettings(), sparse, dt=5.0) == \
        track_points(net, MatchSettings(flush_scored=True), sparse, dt=5.0)
    pts = _pts()
    before: list[list[Event]] = []
    for on in (False, True):
        tracker = Tracker(net, "v", MatchSettings(flush_scored=on))
        events: list[Event] = []
        for i, (x, y) in enumerate(pts):
            events += tracker.update(Fix("v", float(i), 0.0, 0.0, x, y))
        before.append(events)
    assert before[0] == before[1]


def test_flush_scored_is_off_by_default_and_validated() -> None:
    """The key is off by default and must be true or false."""
    assert MatchSettings().flush_scored is False
    problems = MatchSettings(flush_scored=1).problems()  # type: ignore[arg-type]
    assert ("flush_scored", "must be true or false, got 1") in problems


@pytest.mark.parametrize("restore_at", [20, 30])
def test_flush_scored_restored_mid_drive_flushes_the_same(restore_at: int) -> None:
    """A tracker checkpointed and restored before the flush commits the same answers."""
    net = _fork()
    pts = _pts()
    settings = MatchSettings(flush_scored=True)
    assert track_points(net, settings, pts, restore_at=restore_at) == \
        track_points(net, settings, pts)
