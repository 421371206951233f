"""``bridge_error_corr``: a bridged step charges the part of a fix's offset from its
matched point that the offset at the fix before does not explain.

GNSS error is correlated in time (first-order Gauss-Markov; Ranacher et al., IJGIS 2016):
a lean that pulls every fix the same way for minutes is ordinary, and the path cost, which
charges each fix's offset as if independent, then prefers a road alongside the driven one
that the lean brings the fixes closer to. With the rule, switching onto that road costs
the sudden change of offset it implies.

Invented data: a straight two-way road A along y = 0 and a parallel road B 9 m north of
it for 1.4 km, joined to A at both ends; a vehicle drives A east at 8 m/s, its fixes
leaning 6 m north (towards B: 3 m from B, 6 m from A) plus 0.7 m of independent noise.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit, MatchedFix
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node, StepContext, _offer
from livematch.core.tracker import Tracker
from livematch.core.view import view_of

shapely = pytest.importorskip("shapely")
stats = pytest.importorskip("scipy.stats")

ROAD_A = [(-400.0, 0.0), (150.0, 0.0), (1650.0, 0.0), (2400.0, 0.0)]
ROAD_B = [(150.0, 0.0), (200.0, 9.0), (1600.0, 9.0), (1650.0, 0.0)]
LINE_A = shapely.LineString(ROAD_A)
SPEED = 8.0


def _network() -> RoadNetwork:
    return network_from_roads([Road(ROAD_A, way=1), Road(ROAD_B, way=2)])


def _drive(dt: float, lean: float, seed: int) -> list[Fix]:
    rng = np.random.default_rng(seed)
    n = int(2650.0 / (SPEED * dt))
    noise = rng.normal(0.0, 0.7, (n, 2))
    return [Fix("v", 1e9 + dt * i, 0.0, 0.0, -350.0 + SPEED * dt * i + float(noise[i, 0]),
                lean + float(noise[i, 1])) for i in range(n)]


def _finals(settings: MatchSettings, fixes: list[Fix]) -> list[MatchedFix]:
    tracker = Tracker(_network(), "v", settings)
    events = [e for f in fixes for e in tracker.update(f)] + tracker.flush()
    return [m for e in events if isinstance(e, Commit) for m in e.fixes]


def _off_road_a(finals: list[MatchedFix]) -> int:
    """Final answers more than 0.5 m from road A (shapely's distance)."""
    return sum(1 for m in finals if LINE_A.distance(shapely.Point(m.x, m.y)) > 0.5)


@pytest.mark.parametrize(("dt", "seed"), [(15.0, 1), (15.0, 2), (15.0, 3), (30.0, 1),
                                          (30.0, 2)])
def test_lean_towards_a_parallel_road(dt: float, seed: int) -> None:
    """Without the rule over half the fixes on the parallel stretch are answered on B
    (measured: 12 of 22 fixes at 15 s, 6 of 11 at 30 s); with it every answer is on A."""
    fixes = _drive(dt, 6.0, seed)
    plain = _finals(MatchSettings(), fixes)
    corr = _finals(MatchSettings(bridge_error_corr=True), fixes)
    assert len(plain) == len(corr) == len(fixes)
    assert _off_road_a(plain) >= len(fixes) // 2
    assert _off_road_a(corr) == 0


def test_no_lean_no_change() -> None:
    """Fixes that do not lean are answered on A either way."""
    fixes = _drive(15.0, 0.0, 1)
    assert _off_road_a(_finals(MatchSettings(), fixes)) == 0
    assert _off_road_a(_finals(MatchSettings(bridge_error_corr=True), fixes)) == 0


def test_steps_up_to_gap_s_are_unchanged() -> None:
    """At 5 s between fixes (no step longer than ``gap_s``) the rule does not act: the
    same events, B included (the sweep keeps the independent distance term)."""
    fixes = _drive(5.0, 6.0, 1)
    plain = _finals(MatchSettings(), fixes)
    assert plain == _finals(MatchSettings(bridge_error_corr=True), fixes)
    assert _off_road_a(plain) > 0


def test_distance_term_is_the_gauss_markov_conditional() -> None:
    """The rule's distance term less the independent one equals, up to the constant of
    normalisation, the negative log density of the offset given the one before under a
    stationary AR(1) error (two correlated normals, scipy.stats) less its marginal's."""
    view = view_of(network_from_roads([Road([(0.0, 0.0), (300.0, 0.0)], way=1)]))
    sigma, rho = 5.0, math.exp(-15.0 / 30.0)
    x0, y0, x1, y1 = 100.0, 4.0, 220.0, -3.0
    parent = Node(0, 1, 0.0, 0.33, 99.0, 0.0, None, (), 0.0, 0.0)  # matched at (99, 0)
    costs = []
    for r in (0.0, rho):
        ctx = StepContext(view, 15.0, x0, y0, x1, y1, 2, 15.0, math.hypot(x1 - x0, y1 - y0),
                          1.0 / (2.0 * sigma * sigma), 0.1, 2.0, 0.2, error_rho=r)
        new: dict[int, Node] = {}
        _offer(new, ctx, 0, 0.0, 1.0, parent, ())
        costs.append(new[0].cost)
        assert (new[0].x, new[0].y) == pytest.approx((220.0, 0.0))
    e0 = (99.0 - x0, 0.0 - y0)
    e1 = (220.0 - x1, 0.0 - y1)
    cov = sigma * sigma * np.array([[1.0, rho], [rho, 1.0]])
    conditional = sum(-(stats.multivariate_normal.logpdf([a, b], cov=cov)
                        - stats.norm.logpdf(a, scale=sigma)) for a, b in zip(e0, e1, strict=True))
    marginal = sum(-stats.norm.logpdf(b, scale=sigma) for b in e1)
    expected = conditional - marginal - math.log(1.0 - rho * rho)
    assert costs[1] - costs[0] == pytest.approx(expected, rel=1e-9)


def test_setting_is_validated() -> None:
    assert ("bridge_error_corr", "must be true or false, got 1") in MatchSettings(
        bridge_error_corr=1).problems()  # type: ignore[arg-type]
    assert MatchSettings(bridge_error_corr=True).problems() == []
