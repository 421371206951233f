"""``bridge_error_cross``: as ``bridge_error_corr``, with the offsets correlated across
the road only.

The lean case is the same invented road pair as tests/test_bridge_error_corr.py: a
straight two-way road A along y = 0 and a parallel road B 9 m north of it for 1.4 km,
joined to A at both ends; a vehicle drives A east at 8 m/s, its fixes leaning 6 m north
(towards B) plus 0.7 m of independent noise. The term itself is checked against the
bivariate normal of scipy.stats (first-order Gauss-Markov error: consecutive offsets on
one axis are jointly normal with correlation rho; Ranacher et al., IJGIS 2016, on
temporally correlated GNSS error).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node, StepContext, _offer
from livematch.core.view import NetworkView, view_of
from tests.test_bridge_error_corr import _drive, _finals, _off_road_a

stats = pytest.importorskip("scipy.stats")

SIGMA = 5.0
RHO = math.exp(-15.0 / 30.0)


@pytest.mark.parametrize(("dt", "seed"), [(15.0, 1), (15.0, 2), (15.0, 3), (30.0, 1),
                                          (30.0, 2)])
def test_lean_towards_a_parallel_road(dt: float, seed: int) -> None:
    """Without the rule over half the fixes on the parallel stretch are answered on B;
    with it every answer is on A (shapely's distance, in ``_off_road_a``)."""
    fixes = _drive(dt, 6.0, seed)
    plain = _finals(MatchSettings(), fixes)
    cross = _finals(MatchSettings(bridge_error_cross=True), fixes)
    assert len(plain) == len(cross) == len(fixes)
    assert _off_road_a(plain) >= len(fixes) // 2
    assert _off_road_a(cross) == 0


def test_steps_up_to_gap_s_are_unchanged() -> None:
    """At 5 s between fixes (no step longer than ``gap_s``) the rule does not act."""
    fixes = _drive(5.0, 6.0, 1)
    plain = _finals(MatchSettings(), fixes)
    assert plain == _finals(MatchSettings(bridge_error_cross=True), fixes)


def _cost(view: NetworkView, parent: Node, seg: int, x0: float, y0: float, x1: float,
          y1: float, rho: float, cross: bool, lo: float = 0.0) -> Node:
    ctx = StepContext(view, 15.0, x0, y0, x1, y1, 2, 15.0, math.hypot(x1 - x0, y1 - y0),
                      1.0 / (2.0 * SIGMA * SIGMA), 0.1, 2.0, 0.2, error_rho=rho,
                      error_cross=cross)
    new: dict[int, Node] = {}
    _offer(new, ctx, seg, lo, 1.0, parent, ())
    return new[seg]


def _nll_given(e1: float, e0: float, rho: float) -> float:
    """-log density of e1 given e0 for two standard-normal-scaled offsets of correlation
    rho (scipy's bivariate normal less its marginal), without the normalisation's
    log(1 - rho^2) (the path cost leaves constants out)."""
    cov = SIGMA * SIGMA * np.array([[1.0, rho], [rho, 1.0]])
    joint = stats.multivariate_normal.logpdf([e0, e1], cov=cov)
    return float(-(joint - stats.norm.logpdf(e0, scale=SIGMA))) - 0.5 * math.log(1.0 - rho * rho)


def test_along_one_road_the_cross_axis_is_conditional() -> None:
    """Parent and offer on one east-going segment: the offset across (y) is charged given
    the parent's, the along-road part of the offer is zero (an interior projection), and
    the parent's along-road offset (1 m behind its fix) does not count."""
    view = view_of(network_from_roads([Road([(0.0, 0.0), (300.0, 0.0)], way=1)]))
    parent = Node(0, 1, 0.0, 0.33, 99.0, 0.0, None, (), 0.0, 0.0)  # fix (100, 4)
    base = _cost(view, parent, 0, 100.0, 4.0, 220.0, -3.0, 0.0, False).cost
    got = _cost(view, parent, 0, 100.0, 4.0, 220.0, -3.0, RHO, True).cost
    marginal_y = -(stats.norm.logpdf(3.0, scale=SIGMA) - stats.norm.logpdf(0.0, scale=SIGMA))
    expected = _nll_given(3.0, -4.0, RHO) - (0.5 * math.log(2 * math.pi) + math.log(SIGMA))
    assert got - base == pytest.approx(expected - marginal_y, rel=1e-9)


def test_twin_parent_keeps_the_side() -> None:
    """A parent on the west-going twin: its offset 4 m south of its fix is, for the
    east-going offer, on the same side of the road (north of the road in both: the fix
    lies north of the road), so an offer whose fix also lies 4 m north of the road pays
    what it pays after a parent on the same segment."""
    view = view_of(network_from_roads([Road([(0.0, 0.0), (300.0, 0.0)], way=1)]))
    east = 0 if view.vx[view.st[0]] > view.vx[view.sf[0]] else 1
    west = 1 - east
    assert view.twin[east] == west
    same = Node(east, 1, 0.0, 0.33, 99.0, 0.0, None, (), 0.0, 0.0)
    w_pos = 1.0 - 99.0 / 300.0
    twin = Node(west, 1, 0.0, w_pos, 99.0, 0.0, None, (), 0.0, 0.0)
    a = _cost(view, same, east, 99.0, 4.0, 200.0, 4.0, RHO, True).cost
    b = _cost(view, twin, east, 99.0, 4.0, 200.0, 4.0, RHO, True).cost
    # the route terms differ (the twin's step turns round); compare the distance terms
    plain_a = _cost(view, same, east, 99.0, 4.0, 200.0, 4.0, 0.0, False).cost
    plain_b = _cost(view, twin, east, 99.0, 4.0, 200.0, 4.0, 0.0, False).cost
    assert a - plain_a == pytest.approx(b - plain_b, abs=1e-12)
    # the same lean on the same side costs less than the independent term
    assert a < plain_a


def test_perpendicular_parent_is_the_independent_term() -> None:
    """A parent on a north-going segment tells nothing about the error across an
    east-going one (k = 0): the offer's term is the independent one."""
    view = view_of(network_from_roads([Road([(0.0, -100.0), (0.0, 0.0), (300.0, 0.0)],
                                            way=1)]))
    ends = [(view.vx[view.sf[s]], view.vy[view.sf[s]], view.vx[view.st[s]], view.vy[view.st[s]])
            for s in range(len(view.sf))]
    north = ends.index((0.0, -100.0, 0.0, 0.0))
    east = ends.index((0.0, 0.0, 300.0, 0.0))
    parent = Node(north, 1, 0.0, 0.5, 0.0, -50.0, None, (), 0.0, 0.0)  # fix (6, -50)
    base = _cost(view, parent, east, 6.0, -50.0, 120.0, 5.0, 0.0, False).cost
    got = _cost(view, parent, east, 6.0, -50.0, 120.0, 5.0, RHO, True).cost
    assert got == pytest.approx(base, rel=1e-12)


def test_clamped_offer_keeps_along_road_part_independent() -> None:
    """An offer clamped to the start of its segment (the fix lies 10 m before it): the
    10 m along the road keep the independent term, only the cross part is conditional."""
    view = view_of(network_from_roads([Road([(0.0, 0.0), (300.0, 0.0)], way=1)]))
    parent = Node(0, 1, 0.0, 0.0, 0.0, 0.0, None, (), 0.0, 0.0)  # fix (0, 2)
    got = _cost(view, parent, 0, 0.0, 2.0, -10.0, 2.0, RHO, True)
    assert (got.x, got.y) == pytest.approx((0.0, 0.0))
    plain = _cost(view, parent, 0, 0.0, 2.0, -10.0, 2.0, 0.0, False)
    inv = 1.0 / (2.0 * SIGMA * SIGMA)
    w = -2.0 - RHO * -2.0
    assert got.cost - plain.cost == pytest.approx(
        (100.0 + w * w / (1.0 - RHO * RHO)) * inv - (100.0 + 4.0) * inv, rel=1e-9)


def test_setting_is_validated() -> None:
    assert ("bridge_error_cross", "must be true or false, got 1") in MatchSettings(
        bridge_error_cross=1).problems()  # type: ignore[arg-type]
    assert MatchSettings(bridge_error_cross=True).problems() == []
