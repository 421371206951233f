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

Bearings are compared in the network's grid: the heading (from true north) is turned by
the meridian convergence at the fix (:meth:`~livematch.core.geometry.Projection.north_bearing`).
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt

from livematch.core.geometry import Projection

__all__ = ["HEADING_MIN_MPS", "HEADING_SPREAD_DEG", "grid_heading", "heading_charges"]

#: Width of the charge's well, degrees (judgement: road geometry and corners, not the
#: receiver, set it; see the module's docstring).
HEADING_SPREAD_DEG = 20.0

#: A heading is ignored where the same fix reports a speed below this, m/s: a receiver's
#: course at a stand is noise (common practice to leave it out; the value from memory).
HEADING_MIN_MPS = 1.0


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
