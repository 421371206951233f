"""The answer shape every baseline matcher returns."""

from __future__ import annotations

from dataclasses import dataclass, field

from livematch.core.geometry import project_on_segment
from livematch.core.network import RoadNetwork


@dataclass(frozen=True, slots=True)
class Matched:
    """A fix placed on the network: directed segment, offset from its start, point.

    Attributes:
        segment: segment index.
        offset_m: distance from the segment's start, metres.
        x, y: the matched point, projected metres.
        distance_m: distance from the fix to the matched point, metres.
    """

    segment: int
    offset_m: float
    x: float
    y: float
    distance_m: float


@dataclass
class TraceMatch:
    """A matcher's answers for one vehicle's trace, one entry per fix.

    Attributes:
        live: the answer given when the fix arrived (None: no answer).
        final: the settled answer (None: no answer).
        path: the settled driven path as directed segments in order; consecutive
            segments are connected except where the matcher restarted.
    """

    live: list[Matched | None] = field(default_factory=list)
    final: list[Matched | None] = field(default_factory=list)
    path: list[int] = field(default_factory=list)


def project_point(network: RoadNetwork, segment: int, x: float, y: float) -> Matched:
    """The closest point of ``segment`` to (x, y) as a :class:`Matched`.

    >>> import numpy as np
    >>> from livematch.core.geometry import Projection
    >>> net = RoadNetwork(Projection.local(0, 0), np.array([[0.0, 0], [10, 0]]),
    ...     np.array([1, 2]), np.array([0]), np.array([1]), np.array([7]), np.array([0]),
    ...     [{"highway": "residential"}])
    >>> project_point(net, 0, 4.0, 3.0)
    Matched(segment=0, offset_m=4.0, x=4.0, y=0.0, distance_m=3.0)
    """
    ax, ay, bx, by = network.segment_coords(segment)
    f, d = project_on_segment(ax, ay, bx, by, x, y)
    return Matched(segment, f * float(network.seg_len[segment]), ax + f * (bx - ax),
                   ay + f * (by - ay), d)
