"""MatchSettings.stub_turn_m: a U-turn at a stub's mouth is committed as a turn in the stub.

Invented networks (metres): a main road with a short two-way dead end off it. The lengths
the tests expect come from shapely's lengths of the drawn lines, not from the network.
"""

from __future__ import annotations

import dataclasses
import itertools

import numpy as np
import pytest
import shapely
from catalogue import (
    committed_path,
    final_answers,
    path_line,
    polyline_points,
    seg_of,
    track_points,
)

from livematch.core.build import Road, network_from_roads
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import _stub_from
from livematch.core.view import view_of

MAIN = [(float(x), 0.0) for x in range(0, 401, 50)]
V = (200.0, 0.0)
STUB = [V, (200.0, 6.0), (200.0, 10.0)]  # 10 m north, through a shape point at 6 m
ON = MatchSettings(stub_turn_m=15.0)


def _network() -> RoadNetwork:
    return network_from_roads([Road(MAIN, way=1), Road(STUB, way=2)])


def _drive(stand_s: float, dt: float, seed: int) -> list[tuple[float, float]]:
    """East along the main road from x = 72 m to V at 8 m/s (16 s), then either into the
    stub and back at 2.5 m/s (8 s, between two fixes 15 s apart: none is taken in the
    stub; ``stand_s`` 0) or a stand of ``stand_s`` seconds at V, then west at 8 m/s;
    the 1 Hz positions sampled every ``dt`` s, with 1.5 m of Gaussian noise per axis."""
    east = polyline_points([(72.0, 0.0), V], 8.0)[:-1]
    turn = [V] * int(stand_s) if stand_s > 0 else polyline_points([V, (200.0, 10.0), V], 2.5)[:-1]
    west = polyline_points([V, (0.0, 0.0)], 8.0)
    pts = (east + turn + west)[::int(dt)]
    noise = np.random.default_rng(seed).normal(0.0, 1.5, (len(pts), 2))
    return [(x + float(nx), y + float(ny)) for (x, y), (nx, ny) in zip(pts, noise, strict=True)]


@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5])
def test_stub_turns_turn_round_in_the_stub(seed: int) -> None:
    """A vehicle that drives into a 10 m dead end and back between fixes: without the
    rule the path turns round at the stub's mouth; with it the path drives the stub in
    and out, 2 x its drawn length longer (shapely), answers unchanged."""
    net = _network()
    pts = _drive(0.0, 15.0, seed)
    off = track_points(net, MatchSettings(), pts, 15.0)
    on = track_points(net, ON, pts, 15.0)
    into = seg_of(net, V, (200.0, 6.0))
    back = seg_of(net, (200.0, 6.0), V)
    assert into not in committed_path(off)
    path = committed_path(on)
    assert path.count(into) == 1 and path.count(back) == 1
    # the path stays connected: each segment starts where the one before ends
    assert all(net.seg_to[a] == net.seg_from[b] for a, b in itertools.pairwise(path))
    # shapely: 2 x the stub as drawn (10 m) is all the path gains
    gained = path_line(net, path).length - path_line(net, committed_path(off)).length
    assert gained == pytest.approx(2 * shapely.LineString(STUB).length, abs=1e-6)
    assert final_answers(on) == final_answers(off)


@pytest.mark.parametrize("dt", [5.0, 15.0])
def test_stub_turns_not_after_a_stand_at_the_mouth(dt: float) -> None:
    """A vehicle that stands 40 s at the stub's mouth and leaves the way it came: the
    rule changes nothing (it may have turned where it stood)."""
    net = _network()
    pts = _drive(40.0, dt, 4)
    assert track_points(net, ON, pts, dt) == track_points(net, MatchSettings(), pts, dt)


def test_stub_turns_not_when_the_branch_is_longer_than_the_limit() -> None:
    """With a limit below the stub's drawn length (10 m) the path is the rule-off path."""
    net = _network()
    pts = _drive(0.0, 15.0, 1)
    short = dataclasses.replace(ON, stub_turn_m=9.0)
    assert committed_path(track_points(net, short, pts, 15.0)) == committed_path(
        track_points(net, MatchSettings(), pts, 15.0))


def test_stub_from_reads_the_drawn_dead_ends() -> None:
    """_stub_from: a two-way road through shape points to a dead end within the limit
    (its length against shapely's), nothing past a junction, one-way or too long."""
    net = network_from_roads([
        Road(MAIN, way=1), Road(STUB, way=2),
        Road([(100.0, 0.0), (100.0, 8.0)], way=3, oneway=True),  # one-way dead end
        Road([(300.0, 0.0), (300.0, 20.0)], way=4),  # 20 m dead end
    ])
    view = view_of(net)
    stub = _stub_from(view, seg_of(net, V, (200.0, 6.0)), 15.0)
    assert stub == [seg_of(net, V, (200.0, 6.0)), seg_of(net, (200.0, 6.0), (200.0, 10.0))]
    assert sum(view.slen[s] for s in stub) == pytest.approx(shapely.LineString(STUB).length)
    assert _stub_from(view, seg_of(net, (100.0, 0.0), (100.0, 8.0)), 15.0) == []
    assert _stub_from(view, seg_of(net, (300.0, 0.0), (300.0, 20.0)), 15.0) == []
    assert _stub_from(view, seg_of(net, (300.0, 0.0), (300.0, 20.0)), 25.0) != []
    # along the main road from V: it reaches a junction-free end only 200 m on
    assert _stub_from(view, seg_of(net, V, (250.0, 0.0)), 15.0) == []


def test_stub_turn_m_default_and_validation() -> None:
    """Off by default; a negative or non-finite value is refused."""
    assert MatchSettings().stub_turn_m == 0.0
    assert "stub_turn_m" in dict(MatchSettings(stub_turn_m=-1.0).problems())
    assert "stub_turn_m" in dict(MatchSettings(stub_turn_m=float("nan")).problems())
    assert MatchSettings(stub_turn_m=15.0).problems() == []
