"""MatchSettings.filtered_pace: a filtered fix's final answer placed by a smooth drive.

The curve is checked against scipy's cubic Hermite spline
(``scipy.interpolate.CubicHermiteSpline``, an outside implementation of the same
interpolant) and its monotonicity against the Fritsch & Carlson (1980) condition; the
tracker's answer for a dropped spike against the same spline built from the committed
neighbours, on a drawn grid (tests/catalogue.py).
"""

from __future__ import annotations

import dataclasses
import itertools
import math

import numpy as np
import pytest
from scipy.interpolate import CubicHermiteSpline

from livematch.core.events import Commit, Filtered
from livematch.core.fix import Fix
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker, _paced_share
from tests.catalogue import fixes_along, grid

# the end-of-log stand rules move the answers of the stand that ends this drive; off
# here, so that every final answer is the committed node's own point
PLAIN = MatchSettings(end_stand=False, end_stand_sparse=False, end_at_vertex=False)
ON = dataclasses.replace(PLAIN, filtered_pace=True)


def _scipy_share(u: float, alpha: float, beta: float) -> float:
    """scipy's cubic Hermite spline through (0, 0) and (1, 1) with slopes alpha, beta."""
    return float(CubicHermiteSpline([0.0, 1.0], [0.0, 1.0], [alpha, beta])(u))


@pytest.mark.parametrize("alpha,beta", [(1.0, 1.0), (2.0, 0.0), (0.0, 2.0), (0.3, 1.7),
                                        (2.9, 0.5), (1.5, 1.5)])
def test_paced_share_is_scipys_hermite_spline(alpha: float, beta: float) -> None:
    """Within the Fritsch-Carlson circle (alpha^2 + beta^2 <= 9) the curve is scipy's."""
    for u in np.linspace(0.0, 1.0, 11):
        assert _paced_share(float(u), alpha, beta) == pytest.approx(
            _scipy_share(float(u), alpha, beta), abs=1e-12)


@pytest.mark.parametrize("alpha,beta", [(4.0, 0.0), (0.0, 5.0), (4.0, 4.0), (8.0, 1.0)])
def test_paced_share_limits_steep_ends_and_never_goes_back(alpha: float, beta: float) -> None:
    """Outside the circle the slopes are scaled onto it (scipy's spline with the scaled
    slopes), and the curve rises monotonically, where scipy's spline with the raw slopes
    goes back somewhere (a route driven backwards in time)."""
    f = 3.0 / math.hypot(alpha, beta)
    us = np.linspace(0.0, 1.0, 201)
    ours = [_paced_share(float(u), alpha, beta) for u in us]
    for u, y in zip(us, ours, strict=True):
        assert y == pytest.approx(_scipy_share(float(u), alpha * f, beta * f), abs=1e-12)
    assert all(b >= a - 1e-12 for a, b in itertools.pairwise(ours))
    raw = CubicHermiteSpline([0.0, 1.0], [0.0, 1.0], [alpha, beta])(us)
    assert np.diff(raw).min() < 0.0


def test_paced_share_negative_slopes_count_as_standing() -> None:
    """A slope below 0 (a route read backwards) is taken as a stand, slope 0."""
    assert _paced_share(0.3, -1.0, 1.0) == _paced_share(0.3, 0.0, 1.0)


def _position(t: float) -> float:
    """East along Row 1 (y = 200): 10 m/s from x = 60, braking evenly from t = 30 s to a
    stop at x = 510 at t = 60 s, standing there after."""
    if t <= 30.0:
        return 60.0 + 10.0 * t
    if t <= 60.0:
        return 360.0 + 10.0 * (t - 30.0) - (t - 30.0) ** 2 / 6.0
    return 510.0


T0 = 1_700_000_000.0


def _run(settings: MatchSettings) -> list:
    fixes = fixes_along([(_position(15.0 * i), 201.0) for i in range(7)], t0=T0, dt=15.0)
    bad = fixes[3]  # 150 m north of the truth, near no road the drive can reach
    fixes[3] = Fix(bad.vehicle, bad.t, 0.0, 0.0, _position(45.0), 351.0)
    tracker = Tracker(grid(), "v1", settings)
    events = []
    for f in fixes:
        events.extend(tracker.update(f))
    events.extend(tracker.flush())
    return events


def test_dropped_spike_is_placed_by_the_neighbouring_speeds() -> None:
    """A spike dropped between a fix at full speed and a stop: in proportion to time its
    answer lies halfway (x = 435, 37.5 m behind the truth); with the rule the commit's
    speed out of the later neighbour (standing: 0) puts it further on, at scipy's Hermite
    spline through the neighbours with that end speed and, at the start of the commit,
    where the step into the earlier neighbour is not held, the mean speed."""
    off, on = _run(PLAIN), _run(ON)
    t0 = T0
    for events in (off, on):
        assert [(e.t - t0, e.reason) for e in events if isinstance(e, Filtered)] == [
            (45.0, "spike")]
    c_off = [c for c in off if isinstance(c, Commit)]
    c_on = [c for c in on if isinstance(c, Commit)]
    # the same commits: same fixes, same path; only the spike's answer differs
    assert [[m.t for m in c.fixes] for c in c_on] == [[m.t for m in c.fixes] for c in c_off]
    assert [c.path for c in c_on] == [c.path for c in c_off]
    final_off = {m.t - t0: m for c in c_off for m in c.fixes}
    final_on = {m.t - t0: m for c in c_on for m in c.fixes}
    assert {t for t in final_on if final_on[t] != final_off[t]} == {45.0}
    # the commit that settles the spike begins at the fix after it (the one before ended
    # a commit): the step into the earlier neighbour is not in it
    holding = next(c for c in c_on if any(m.t - t0 == 45.0 for m in c.fixes))
    assert holding.fixes[0].t - t0 == 45.0
    xa, xb, xc = final_on[30.0].x, final_on[60.0].x, final_on[75.0].x
    assert final_off[45.0].x == pytest.approx((xa + xb) / 2.0, abs=1e-9)
    mean = (xb - xa) / 30.0
    spline = CubicHermiteSpline([30.0, 60.0], [xa, xb], [mean, (xc - xb) / 15.0])
    assert final_on[45.0].x == pytest.approx(float(spline(45.0)), abs=1e-6)
    assert final_on[45.0].y == final_off[45.0].y == 200.0
    truth = _position(45.0)
    assert abs(final_on[45.0].x - truth) < abs(final_off[45.0].x - truth) - 15.0


def test_filtered_pace_default_and_validation() -> None:
    assert MatchSettings().filtered_pace is False
    assert "filtered_pace" in dict(MatchSettings(filtered_pace="yes").problems())  # type: ignore[arg-type]
    assert MatchSettings(filtered_pace=True).problems() == []
