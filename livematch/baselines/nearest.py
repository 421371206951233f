"""The floor: snap every fix to the nearest segment, one fix at a time.

No history, no topology: a fix goes to whichever directed segment is closest. Of the two
directions of a two-way road (equally close) it takes the one with the lower index, so
on two-way roads its direction is right about half the time; that is the point of a
floor.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from livematch.baselines.result import Matched, TraceMatch
from livematch.core.network import RoadNetwork

#: Search radii tried in turn, metres; a fix farther than the last from every road is
#: left unmatched.
RADII: tuple[float, ...] = (25.0, 50.0, 100.0, 200.0, 400.0)


def snap(
    network: RoadNetwork, x: float, y: float, radii: Sequence[float] = RADII
) -> Matched | None:
    """The nearest segment to (x, y), searching in growing radii; None when none is near.

    Ties (a two-way road's two directions) go to the lowest segment index.

    >>> from livematch.core.geometry import Projection
    >>> net = RoadNetwork(Projection.local(0, 0), np.array([[0.0, 0], [10, 0], [10, 10]]),
    ...     np.array([1, 2, 3]), np.array([0, 1]), np.array([1, 2]), np.array([7, 8]),
    ...     np.array([0, 0]), [{"highway": "residential"}])
    >>> snap(net, 9.0, 6.0).segment
    1
    >>> snap(net, 1000.0, 0.0) is None
    True
    """
    for radius in radii:
        near = network.segments_near(x, y, radius)
        if len(near) == 0:
            continue
        a = network.node_xy[network.seg_from[near]]
        b = network.node_xy[network.seg_to[near]]
        d = b - a
        len2 = np.einsum("ij,ij->i", d, d)
        p = np.array([x, y])
        with np.errstate(invalid="ignore", divide="ignore"):
            f = np.where(len2 > 0, np.einsum("ij,ij->i", p - a, d) / len2, 0.0)
        f = np.clip(f, 0.0, 1.0)
        q = a + f[:, None] * d
        dist = np.hypot(q[:, 0] - x, q[:, 1] - y)
        i = int(np.argmin(dist))  # first minimum = lowest index (near is sorted)
        seg = int(near[i])
        return Matched(seg, float(f[i] * network.seg_len[seg]), float(q[i, 0]),
                       float(q[i, 1]), float(dist[i]))
    return None


def match_nearest(network: RoadNetwork, xy: Sequence[tuple[float, float]]) -> TraceMatch:
    """Snap a whole trace: live and final answers are the same.

    The path is the sequence of distinct consecutive snapped segments (not necessarily
    connected).

    >>> from livematch.core.geometry import Projection
    >>> net = RoadNetwork(Projection.local(0, 0), np.array([[0.0, 0], [10, 0]]),
    ...     np.array([1, 2]), np.array([0]), np.array([1]), np.array([7]), np.array([0]),
    ...     [{"highway": "residential"}])
    >>> match_nearest(net, [(1.0, 1.0), (2.0, -1.0)]).path
    [0]
    >>> match_nearest(net, []).path
    []
    """
    out = TraceMatch()
    for x, y in xy:
        m = snap(network, x, y)
        out.live.append(m)
        out.final.append(m)
        if m is not None and (not out.path or out.path[-1] != m.segment):
            out.path.append(m.segment)
    return out
