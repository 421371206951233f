"""bench/alongside.py's test of a missed answer against the driven road near the truth.

Plain data: a street east along y = 0 (way 1), a lane drawn 4 m north of it over other
vertices (way 2, the kind of road a map draws beside a street), and a side street north
from x = 300 (way 3). The separation the script reports is checked against shapely's
distance from the answered point to the driven line (an outside reference).
"""

from __future__ import annotations

import math

import numpy as np
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.network import RoadNetwork
from tests.catalogue import bench_module

STREET, LANE, SIDE = 1, 2, 3


def _net() -> RoadNetwork:
    street = Road([(float(x), 0.0) for x in range(0, 601, 50)], way=STREET)
    lane = Road([(120.0, 4.0), (220.0, 4.0), (320.0, 4.0)], way=LANE)
    side = Road([(300.0, 0.0), (300.0, 80.0)], way=SIDE)
    return network_from_roads([street, lane, side])


def _seg(net: RoadNetwork, way: int, x_from: float, x_to: float | None = None) -> int:
    """The directed segment of ``way`` starting at x = ``x_from`` (ending at ``x_to``)."""
    for s in range(len(net.seg_len)):
        ax, _ay, bx, _by = net.segment_coords(s)
        if int(net.seg_way[s]) == way and math.isclose(ax, x_from) and (
                x_to is None or math.isclose(bx, x_to)):
            return s
    raise LookupError((way, x_from, x_to))


def _street_path(net: RoadNetwork) -> tuple[tuple[int, ...], np.ndarray]:
    path = tuple(_seg(net, STREET, float(x), float(x + 50)) for x in range(0, 600, 50))
    lens = [float(net.seg_len[s]) for s in path]
    return path, np.concatenate([[0.0], np.cumsum(lens)])[:len(path)]


def test_alongside_lane_beside_the_street_with_its_separation() -> None:
    """An answer on the lane beside the street driven is alongside, 4 m off by shapely."""
    al = bench_module("alongside")
    net = _net()
    path, starts = _street_path(net)
    lane = _seg(net, LANE, 120.0)
    kind, sep = al.where(net, path, starts, 170.0, lane, 50.0, 60.0, 7.0)
    assert kind == "alongside"
    point = shapely.Point(170.0, 4.0)  # the lane's point 50 m from its start
    assert math.isclose(sep, shapely.LineString([(0.0, 0.0), (600.0, 0.0)]).distance(point))
    assert al.bucket(sep, 7.0) == "3-5 m"
    # with 2 m as the bound the lane counts no more
    assert al.where(net, path, starts, 170.0, lane, 50.0, 60.0, 2.0)[0] == "other"


def test_alongside_leaves_the_reverse_the_side_street_and_far_roads() -> None:
    """The street's reverse is the same road; a side street leaving the driven road is a
    turn, not a road beside it; the lane far from the truth along the path is not looked
    at (no driven segment within the window)."""
    al = bench_module("alongside")
    net = _net()
    path, starts = _street_path(net)
    back = int(net.seg_twin[path[3]])
    assert al.where(net, path, starts, 170.0, back, 10.0, 60.0, 7.0)[0] == "same road"
    side = _seg(net, SIDE, 300.0)
    assert al.where(net, path, starts, 300.0, side, 2.0, 60.0, 7.0)[0] == "other"
    lane = _seg(net, LANE, 220.0)
    assert al.where(net, path, starts, 560.0, lane, 50.0, 60.0, 7.0)[0] == "other"
