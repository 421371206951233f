"""Tests of the baseline matchers: nearest-segment snapping and the Newson & Krumm HMM."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import stats

from livematch.baselines import HmmMatcher, HmmSettings, match_hmm, match_nearest, snap
from livematch.baselines.hmm import estimate_beta, estimate_sigma_z
from livematch.core.network import RoadNetwork
from tests.catalogue import grid, oneway_pair, polyline_points


def segment_between(net: RoadNetwork, a: tuple[float, float], b: tuple[float, float]) -> int:
    """The directed segment from vertex at a to vertex at b."""
    va = int(np.flatnonzero((net.node_xy == a).all(axis=1))[0])
    vb = int(np.flatnonzero((net.node_xy == b).all(axis=1))[0])
    for s in net.out_segments(va):
        if net.seg_to[s] == vb:
            return int(s)
    raise AssertionError(f"no segment {a} -> {b}")


def path_segments(net: RoadNetwork, corners: list[tuple[float, float]], step: float) -> list[int]:
    """The directed segments of a path through grid corners, shape points every step m."""
    pts = polyline_points(corners, step)
    return [segment_between(net, a, b) for a, b in itertools.pairwise(pts)]


def test_snap_fix_on_one_way_segment_returns_it():
    """A fix exactly on a one-way segment snaps to that segment at its offset."""
    net = oneway_pair()
    seg = segment_between(net, (300.0, 0.0), (350.0, 0.0))
    m = snap(net, 320.0, 0.0)
    assert m is not None
    assert (m.segment, m.offset_m, m.x, m.y, m.distance_m) == (seg, 20.0, 320.0, 0.0, 0.0)


def test_snap_fix_on_two_way_segment_returns_lower_index_direction():
    """On a two-way road both directions are equally near: the lower index wins."""
    net = grid()
    seg = segment_between(net, (100.0, 200.0), (150.0, 200.0))
    twin = int(net.seg_twin[seg])
    m = snap(net, 130.0, 200.0)
    assert m is not None and m.segment == min(seg, twin) and m.distance_m == 0.0


def test_snap_far_from_every_road_returns_none():
    """Beyond the largest search radius there is no answer."""
    assert snap(grid(), 5000.0, 5000.0) is None


def test_match_nearest_path_is_distinct_consecutive_segments():
    """The nearest path lists each run of fixes on one segment once."""
    net = oneway_pair()
    m = match_nearest(net, [(310.0, 1.0), (320.0, -1.0), (360.0, 0.5)])
    assert m.path == [segment_between(net, (300.0, 0.0), (350.0, 0.0)),
                      segment_between(net, (350.0, 0.0), (400.0, 0.0))]
    assert m.live == m.final


def test_hmm_noise_free_fixes_return_the_known_path():
    """Noise-free fixes every 20 m along a path with turns give exactly that path, and
    every fix's final answer is its true segment (direction included) at distance 0."""
    net = grid()
    corners = [(0.0, 0.0), (400.0, 0.0), (400.0, 200.0), (200.0, 200.0), (200.0, 600.0)]
    truth = path_segments(net, corners, 50.0)  # every segment is 50 m long
    fixes, true_seg = [], []
    for d in np.arange(7.0, 50.0 * len(truth), 20.0):  # 7 + 20k never hits a vertex
        seg = truth[int(d // 50.0)]
        ax, ay, bx, by = net.segment_coords(seg)
        f = (d % 50.0) / 50.0
        fixes.append((ax + f * (bx - ax), ay + f * (by - ay)))
        true_seg.append(seg)
    times = [1000.0 + 2.0 * i for i in range(len(fixes))]
    m = match_hmm(net, fixes, HmmSettings(lag=3), times)
    assert m.path == truth
    assert [f.segment if f else None for f in m.final] == true_seg
    assert all(f is not None and f.distance_m == pytest.approx(0.0, abs=1e-9)
               for f in m.final)


def test_hmm_sparse_noise_free_fixes_route_between_them():
    """Fixes 150 m apart: the path between them is filled in by routing."""
    net = grid()
    corners = [(0.0, 0.0), (400.0, 0.0), (400.0, 400.0)]
    truth = path_segments(net, corners, 50.0)
    fixes = [(10.0, 0.0), (160.0, 0.0), (310.0, 0.0), (400.0, 60.0), (400.0, 210.0),
             (400.0, 360.0), (400.0, 399.0)]
    m = match_hmm(net, fixes, HmmSettings(beta=10.0, lag=2))
    assert m.path == truth


def test_hmm_lag_zero_final_equals_live():
    """With lag 0 every fix is decided as it arrives, so final equals live."""
    net = grid()
    rng = np.random.default_rng(3)
    pts = polyline_points([(0.0, 0.0), (600.0, 0.0), (600.0, 400.0)], 15.0)
    noisy = [(x + rng.normal(0, 3), y + rng.normal(0, 3)) for x, y in pts]
    m = match_hmm(net, noisy, HmmSettings(lag=0, min_move_m=0.0))
    assert m.final == m.live


def test_hmm_gap_without_candidates_restarts_chain():
    """A fix far from every road has no answer; the fixes after it are matched again."""
    net = grid()
    matcher = HmmMatcher(net, HmmSettings(lag=1))
    answers = [matcher.update(x, y) for x, y in
               [(20.0, 1.0), (60.0, 1.0), (5000.0, 5000.0), (120.0, 1.0), (160.0, 1.0)]]
    matcher.flush()
    assert answers[2] is None and matcher.final[2] is None
    east = [segment_between(net, (0.0, 0.0), (50.0, 0.0)),
            segment_between(net, (50.0, 0.0), (100.0, 0.0)),
            segment_between(net, (100.0, 0.0), (150.0, 0.0)),
            segment_between(net, (150.0, 0.0), (200.0, 0.0))]
    assert [matcher.final[i].segment for i in (0, 1, 3, 4)] == east
    # the second chain starts on the next segment, so the path reads on without a hole
    assert matcher.path == [east[0], east[1], east[2], east[3]]


def test_hmm_stationary_jitter_is_not_a_new_step():
    """Fixes within 2 sigma_z of the last kept fix take that step's segment (paper's rule)."""
    net = grid()
    matcher = HmmMatcher(net, HmmSettings(sigma_z=4.0, lag=0))
    first = matcher.update(120.0, 2.0)
    again = matcher.update(118.0, -3.0)  # 5.4 m away < 8 m
    matcher.flush()
    assert again is not None and first is not None
    assert again.segment == first.segment and (again.x, again.y) == (118.0, 0.0)
    assert matcher.final[1].segment == matcher.final[0].segment
    assert len(matcher.path) == 1


def test_estimate_sigma_z_recovers_gaussian_sigma():
    """1.4826 is 1 / Phi^-1(3/4) (scipy.stats.norm), so MAD * 1.4826 estimates sigma."""
    assert 1.0 / stats.norm.ppf(0.75) == pytest.approx(1.4826, abs=1e-4)
    x = stats.norm.rvs(scale=4.07, size=200_000, random_state=np.random.default_rng(1))
    # sampling error of a median of 200k values is ~0.3 %; allow 1 %
    assert estimate_sigma_z(x) == pytest.approx(4.07, rel=0.01)


def test_estimate_beta_recovers_exponential_scale():
    """The median of an exponential is beta ln 2 (scipy.stats.expon), so beta comes back."""
    assert stats.expon(scale=3.0).median() == pytest.approx(3.0 * math.log(2.0), rel=1e-12)
    x = stats.expon.rvs(scale=3.0, size=200_000, random_state=np.random.default_rng(2))
    assert estimate_beta(x) == pytest.approx(3.0, rel=0.01)


def test_baselines_docstring_examples_hold():
    """The worked examples in the baselines' docstrings hold (run as doctests)."""
    import doctest

    from livematch.baselines import hmm, nearest, result

    for module in (hmm, nearest, result):
        outcome = doctest.testmod(module, raise_on_error=False)
        assert outcome.failed == 0 and outcome.attempted > 0, module.__name__
