"""A fix's reported heading as evidence of the direction driven (``MatchSettings.heading_cost``).

Positions alone cannot tell the two directions of one road apart where both fit the fixes
alike: a vehicle that drives into a dead end and out again between two fixes puts the
fix in between on the way in and on the way out at the same place, a turning loop sampled
every 15-30 s puts its fixes where the other way round puts them, the first fix of a log
has no step at all (docs/measured.md, "Session 17 (sparse30)"). A receiver's course over
ground (NMEA RMC), a phone's location bearing or GTFS-realtime's
``VehiclePosition.position.bearing`` says which way the vehicle moved.

The charge: a candidate state whose directed segment makes the angle ``d`` with the
fix's heading pays ``heading_cost * (1 - exp(-d^2 / (2 s^2)))``, ``s`` =
:data:`HEADING_SPREAD_DEG`. It is a Gaussian well with a flat rim: the negative
log-likelihood of a heading whose error is Gaussian with a share of wild values, up to a
constant, has that shape (from the near-zero well to the plateau where the wild share
dominates), and a bounded charge means one wild heading, or a course taken while the
vehicle turns a corner, costs at most ``heading_cost``. The spread is wider than a
receiver's course error at speed (a few degrees, from memory) because the road drawn is
straight segments: a vehicle on a curve, or turning at a junction between two fixes'
segments, points some way off the segment it is matched to.

Two corrections make it a ranking of the states at one fix rather than a verdict on
each (:func:`state_charges`; docs/measured.md, "Session 19 (headingon)"): a state less
than :data:`HEADING_REACH_SIGMAS` ``sigma_m`` into its segment pays the lesser of its own
segment's charge and that of the segment its route came by (the fix's error along the
road puts states past a corner the vehicle has not turned yet), and the charges are
taken less the least of them (a heading that no state goes along, as after a turn round
where the sweep has no U-turn, is no evidence for any one of them).

Bearings are compared in the network's grid: the heading (from true north) is turned by
the meridian convergence at the fix (:meth:`~livematch.core.geometry.Projection.north_bearing`).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Final

import numpy as np
import numpy.typing as npt

from livematch.core.geometry import Projection
from livematch.core.sweep import Node

__all__ = ["HEADING_MIN_MPS", "HEADING_REACH_SIGMAS", "HEADING_SPREAD_DEG", "grid_heading",
           "heading_charges", "node_before", "state_charges"]

#: Width of the charge's well, degrees (judgement: road geometry and corners, not the
#: receiver, set it; see the module's docstring).
HEADING_SPREAD_DEG: Final = 20.0

#: A heading is ignored where the same fix reports a speed below this, m/s: a receiver's
#: course at a stand is noise (common practice to leave it out; the value from memory).
HEADING_MIN_MPS: Final = 1.0

#: How far along the road from a state the vehicle may be when the state's fix was
#: taken, in units of ``MatchSettings.sigma_m``: a fix's error along the road is that of
#: one axis, and two standard deviations hold about 95 % of it (common practice).
HEADING_REACH_SIGMAS: Final = 2.0


def grid_heading(projection: Projection, x: float, y: float,
                 heading_deg: float) -> tuple[float, float]:
    """The unit vector, in the network's grid (east, north metres), of a true heading at (x, y).

    ``heading_deg``: degrees clockwise from true north. The grid bearing is the heading
    plus the grid bearing of true north at the point (the meridian convergence).

    Example (due east at the centre of a local projection; a degenerate 360):
        >>> p = Projection.local(24.94, 60.17)
        >>> [round(v, 9) + 0.0 for v in grid_heading(p, 0.0, 0.0, 90.0)]
        [1.0, 0.0]
        >>> [round(v, 9) + 0.0 for v in grid_heading(p, 0.0, 0.0, 360.0)]
        [0.0, 1.0]
    """
    lon, lat = projection.point_to_lonlat(x, y)
    step = -1e-5 if lat > 89.0 else 1e-5
    x0, y0 = projection.point_to_xy(lon, lat)
    x1, y1 = projection.point_to_xy(lon, lat + step)
    north = math.atan2(math.copysign(1.0, step) * (x1 - x0),
                       math.copysign(1.0, step) * (y1 - y0))
    g = math.radians(heading_deg) + north
    return math.sin(g), math.cos(g)


def heading_charges(seg_geo: npt.NDArray[np.float64], segs: npt.NDArray[np.int32],
                    hx: float, hy: float, cost: float,
                    spread_deg: float = HEADING_SPREAD_DEG) -> npt.NDArray[np.float64]:
    """The heading charge of each segment in ``segs`` for the grid heading (hx, hy).

    Args:
        seg_geo: per segment ``ax, ay, bx - ax, by - ay`` (metres;
            :attr:`livematch.core.fastsweep.SweepArrays.seg_geo`).
        segs: the segments charged.
        hx, hy: the heading's unit vector in the grid (:func:`grid_heading`).
        cost: the charge of a segment pointing straight against the heading's well
            (``MatchSettings.heading_cost``).
        spread_deg: the well's width (the Gaussian's standard deviation), degrees.

    A segment of no length has no direction and is charged nothing.

    Example (segments east, 20 degrees north of east, north, west and of no length;
    heading east: one spread off costs 1 - exp(-1/2) of the whole):
        >>> geo = np.array([[0, 0, 10, 0], [0, 0, math.cos(math.radians(20)),
        ...                 math.sin(math.radians(20))], [0, 0, 0, 10], [0, 0, -10, 0],
        ...                 [0, 0, 0, 0.0]])
        >>> [round(float(c), 3) for c in heading_charges(geo, np.arange(5), 1.0, 0.0, 5.0)]
        [0.0, 1.967, 5.0, 5.0, 0.0]
    """
    d = seg_geo[segs]
    dx = d[:, 2]
    dy = d[:, 3]
    angle = np.arctan2(dx * hy - dy * hx, dx * hx + dy * hy)  # (0, 0) gives 0
    spread = math.radians(spread_deg)
    out: npt.NDArray[np.float64] = cost * -np.expm1(-angle * angle / (2.0 * spread * spread))
    return out


def state_charges(seg_geo: npt.NDArray[np.float64],
                  segs: npt.NDArray[np.int32], along: npt.NDArray[np.float64],
                  before: npt.NDArray[np.int64] | Callable[[npt.NDArray[np.int64]],
                                                           npt.NDArray[np.int64]],
                  hx: float, hy: float, cost: float,
                  reach: float) -> npt.NDArray[np.float64]:
    """The heading charge of each candidate state at one fix, relative to the best.

    Args:
        seg_geo: per segment ``ax, ay, bx - ax, by - ay`` (:func:`heading_charges`).
        segs: each state's segment.
        along: each state's distance from its segment's start (metres).
        before: each state's segment before its own on its route (the last one it
            drove onto its segment from), -1 where none is known; or a function that
            gives it for the states at the indices it is passed (asked only for the
            states less than ``reach`` into their segments: walking a tree up is dear).
        hx, hy: the heading's unit vector in the grid.
        cost: ``MatchSettings.heading_cost``.
        reach: how far along the road the vehicle may be from a state (metres;
            ``HEADING_REACH_SIGMAS * sigma_m``).

    Two corrections to :func:`heading_charges` of the state's own segment, each a
    case where that charge is evidence against the wrong thing (docs/measured.md,
    "Session 19 (headingon)"):

    - A state less than ``reach`` into its segment may be a vehicle still on the
      segment its route came by (the fix's error along the road puts the state past a
      corner the vehicle has not turned yet): it pays the lesser of the two charges.
      Charged for its own segment alone, the state that turned the corner on time paid
      the whole charge at the fix before the turn, and a path that drove on past the
      corner onto a short segment and turned round there came out cheaper.
    - The charges are taken relative to the least of them: the heading ranks the
      states, and where none of them goes its way (the vehicle turned round where the
      sweep allows no U-turn, or drives a road the tree does not hold) it is no
      evidence for any one of them.

    Example (a heading east; states on a segment east, one west 3 m into its segment
    after a segment east, and one west 30 m in; reach 10 m):
        >>> geo = np.array([[0, 0, 50.0, 0], [50, 0, -50.0, 0]])
        >>> c = state_charges(geo, np.array([0, 1, 1], np.int32),
        ...                   np.array([20.0, 3.0, 30.0]), np.array([-1, 0, 0]),
        ...                   1.0, 0.0, 5.0, 10.0)
        >>> [round(float(v), 3) for v in c]
        [0.0, 0.0, 5.0]
    """
    out = heading_charges(seg_geo, segs, hx, hy, cost)
    if len(out) == 0:
        return out
    near = np.nonzero(along < reach)[0]
    if len(near):
        prev = before(near) if callable(before) else before[near]
        known = prev >= 0
        near, prev = near[known], prev[known]
        alt = heading_charges(seg_geo, prev.astype(np.int32), hx, hy, cost)
        out[near] = np.minimum(out[near], alt)
    out -= out.min()
    return out


def node_before(node: Node) -> int:
    """The segment ``node``'s route drove just before its own, -1 if none is known.

    The last segment driven between its parent and it, else the segment of the nearest
    ancestor on another segment.
    """
    if node.via:
        return node.via[-1]
    p = node.parent
    while p is not None:
        if p.seg != node.seg:
            return p.seg
        if p.via:
            return p.via[-1]
        p = p.parent
    return -1
