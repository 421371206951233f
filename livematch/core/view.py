"""A read-only, list-based view of a :class:`RoadNetwork` for the pure-Python hot path.

Indexing a numpy array from Python costs about 100 ns per element, a list about 30 ns;
the sweep touches a few dozen segments per fix, so it reads from plain lists built once
per network and shared by every vehicle (cached on the network object itself, not in a
module global).
"""

from __future__ import annotations

import numpy as np

from livematch.core.network import RoadNetwork


class NetworkView:
    """Plain-list copies of the network arrays the sweep reads on every fix.

    Attributes:
        vx, vy: vertex coordinates (metres).
        sf, st: tail and head vertex of each segment.
        slen: segment length (metres).
        out: per vertex, the tuple of segments leaving it.
        twin: per segment, the opposite-direction segment or -1.
        turn_back_ok: per vertex, whether a U-turn is allowed there: at dead ends and
            intersections (undirected degree other than 2), never at a plain shape point
            in the middle of a road.
    """

    __slots__ = ("network", "out", "sf", "slen", "st", "turn_back_ok", "twin", "vx", "vy")

    def __init__(self, network: RoadNetwork) -> None:
        self.network = network
        self.vx: list[float] = network.node_xy[:, 0].tolist()
        self.vy: list[float] = network.node_xy[:, 1].tolist()
        self.sf: list[int] = network.seg_from.tolist()
        self.st: list[int] = network.seg_to.tolist()
        self.slen: list[float] = network.seg_len.tolist()
        self.twin: list[int] = network.seg_twin.tolist()
        out_seg = network.out_seg.tolist()
        ptr = network.out_ptr.tolist()
        self.out: list[tuple[int, ...]] = [
            tuple(out_seg[ptr[v]:ptr[v + 1]]) for v in range(network.n_vertices)
        ]
        self.turn_back_ok: list[bool] = _undirected_degree(network).__ne__(2).tolist()


def _undirected_degree(network: RoadNetwork) -> np.ndarray:
    """Number of distinct neighbouring vertices of each vertex, ignoring direction."""
    a = np.concatenate([network.seg_from, network.seg_to]).astype(np.int64)
    b = np.concatenate([network.seg_to, network.seg_from]).astype(np.int64)
    keep = a != b
    pairs = np.unique(a[keep] * network.n_vertices + b[keep])
    return np.bincount(pairs // network.n_vertices, minlength=network.n_vertices)


def view_of(network: RoadNetwork) -> NetworkView:
    """The network's shared :class:`NetworkView`, built on first use."""
    view = network._view
    if view is None:
        view = NetworkView(network)
        network._view = view
    return view
