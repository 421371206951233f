"""``motion_step``: the motion term weighs a fix-to-fix step by how well it is known.

Invented data: a 90 m two-way ring (32 m x 13 m, a shape point about every 4 m) with a
150 m spur into one corner; a vehicle drives in along the spur, circles the ring
clockwise at 3.8 m/s (19 m per 5 s fix, a lap every 4-5 fixes, as the 85 m service loop
of ``bench/accuracy.py``'s seed 77 drive 12 at Helsinki) and drives out, its fixes
leaning a few metres to one side while it circles (correlated GNSS error) plus 1 m of
independent noise.
"""

from __future__ import annotations

import itertools
import math
from collections import Counter

import numpy as np
import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker, motion_gain

shapely = pytest.importorskip("shapely")

W, H = 32.0, 13.0
DT, SPEED, LAPS = 5.0, 3.8, 8


def _ring() -> list[tuple[float, float]]:
    corners = [(0.0, 0.0), (0.0, H), (W, H), (W, 0.0), (0.0, 0.0)]
    out: list[tuple[float, float]] = []
    for (ax, ay), (bx, by) in itertools.pairwise(corners):
        n = max(1, round(math.hypot(bx - ax, by - ay) / 4.0))
        out += [(ax + (bx - ax) * i / n, ay + (by - ay) * i / n) for i in range(n)]
    return [*out, corners[-1]]


RING = _ring()
LINE = shapely.LineString(RING)


def _network() -> RoadNetwork:
    return network_from_roads([Road(RING, way=1, highway="service"),
                               Road([(0.0, 0.0), (-150.0, 0.0)], way=2)])


def _drive(lean: tuple[float, float], seed: int) -> list[Fix]:
    """In along the spur, LAPS laps clockwise, out again; the fixes lean by ``lean``
    on the ring. Points along the ring by shapely's linear referencing."""
    step = SPEED * DT
    into = [(-150.0 + step * i, 0.0) for i in range(int(150.0 / step))]
    laps = int(LAPS * LINE.length / step)
    ring = [LINE.interpolate((step * i) % LINE.length) for i in range(laps)]
    out = [(-step * i, 0.0) for i in range(1, 25)]
    noise = np.random.default_rng(seed).normal(0.0, 1.0, (len(into) + laps + len(out), 2))
    pts = (into + [(p.x + lean[0], p.y + lean[1]) for p in ring] + out)
    return [Fix("v", 1e9 + DT * i, 0.0, 0.0, x + float(e[0]), y + float(e[1]))
            for i, ((x, y), e) in enumerate(zip(pts, noise, strict=True))]


def _ring_mismatch(net: RoadNetwork, settings: MatchSettings, fixes: list[Fix]) -> float:
    """Metres of the committed path on the ring that differ from LAPS clockwise laps
    (multisets of directed segments, as the bench's route mismatch)."""
    tracker = Tracker(net, "v", settings)
    events = [e for f in fixes for e in tracker.update(f)] + tracker.flush()
    path = [s for e in events if isinstance(e, Commit) for s in e.path]
    xy = [(float(x), float(y)) for x, y in net.node_xy]
    clockwise = {s for s in range(net.n_segments) if net.seg_way[s] == 1
                 and (xy[net.seg_from[s]], xy[net.seg_to[s]]) in set(itertools.pairwise(RING))}
    # shapely: the clockwise segments are the ring, once round
    assert sum(float(net.seg_len[s]) for s in clockwise) == pytest.approx(LINE.length)
    truth = Counter(dict.fromkeys(clockwise, LAPS))
    got = Counter(s for s in path if net.seg_way[s] == 1)
    return sum(float(net.seg_len[s]) * abs(got[s] - truth[s]) for s in set(got) | set(truth))


def test_laps_read_from_leaning_fixes() -> None:
    """Fixes leaning 8 m south while circling, five noise draws: without the rule
    laps are read as going round the other way or standing (2610 m of the 3600 m
    driven on the ring wrong, measured), with it less than half as much (1178 m). Not
    every draw gains (one with a lean of (3, -6) m lost a lap): the rule reweighs,
    it does not decide."""
    net = _network()
    plain = stepped = 0.0
    for seed in range(1, 6):
        fixes = _drive((0.0, -8.0), seed)
        # (smallest_agrees off: the figures above were measured before it was on by
        # default; with it on, both read more laps wrong: 2790 and 1530 m)
        plain += _ring_mismatch(net, MatchSettings(smallest_agrees=False), fixes)
        stepped += _ring_mismatch(net, MatchSettings(motion_step=True, smallest_agrees=False),
                                  fixes)
    assert plain > 10 * LINE.length
    assert stepped < plain / 2


def test_no_lean_no_change() -> None:
    """Fixes that do not lean: the laps are read right either way."""
    net = _network()
    fixes = _drive((0.0, 0.0), 1)
    assert _ring_mismatch(net, MatchSettings(), fixes) == 0.0
    assert _ring_mismatch(net, MatchSettings(motion_step=True), fixes) == 0.0


def test_motion_gain_is_the_inverse_spread_of_a_step_error() -> None:
    """Against a simulated first-order Gauss-Markov (AR(1)) error, numpy: the standard
    deviation of the difference of two samples dt apart is sigma sqrt(2 (1 - rho)),
    rho = exp(-dt / tau) (the textbook property of the process; from memory, e.g.
    Brown & Hwang, Introduction to Random Signals and Applied Kalman Filtering)."""
    rng = np.random.default_rng(7)
    tau, n = 30.0, 200_000
    rho1 = math.exp(-1.0 / tau)
    x = np.empty(n)
    x[0] = rng.normal()
    kicks = rng.normal(0.0, math.sqrt(1.0 - rho1 * rho1), n)
    for i in range(1, n):
        x[i] = rho1 * x[i - 1] + kicks[i]
    for dt in (1, 5, 15):
        spread = float(np.std(x[dt:] - x[:-dt]))
        assert 1.0 / motion_gain(float(dt), tau) == pytest.approx(spread, rel=0.05)
    # a step no better known than a fix (the spread reaches sigma at rho = 1/2) and no
    # correlation assumed: the plain weight
    assert motion_gain(tau * math.log(2.0), tau) == pytest.approx(1.0)
    assert motion_gain(60.0, tau) == 1.0
    assert motion_gain(5.0, 0.0) == 1.0


def test_setting_is_validated() -> None:
    assert ("motion_step", "must be true or false, got 1") in MatchSettings(
        motion_step=1).problems()  # type: ignore[arg-type]
    assert MatchSettings(motion_step=True).problems() == []
