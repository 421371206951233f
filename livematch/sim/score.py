"""Accuracy measures of a map-matching answer against a simulated drive's ground truth.

All measures work on segment indices of one :class:`~livematch.core.network.RoadNetwork`
and metres. They are pure functions so that tests can check them on hand-made cases.

- :class:`TruePath` answers "is this directed segment on the driven path within ``tol``
  metres, measured along the path, of where the vehicle truly was?" (road-and-direction
  accuracy: the right road, driven the right way, at about the right place).
- :func:`route_mismatch_fraction` is the measure of Newson & Krumm, "Hidden Markov Map
  Matching Through Noise and Sparseness" (ACM SIGSPATIAL GIS 2009): (length erroneously
  added + length erroneously subtracted) / length of the true route.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]


class TruePath:
    """The driven path as intervals along it, indexed by segment.

    Args:
        path: the directed segments driven, in order (a segment may recur).
        seg_len: length of every segment of the network, metres.

    Example (three 10 m segments 0 -> 1 -> 2):
        >>> tp = TruePath([0, 1, 2], np.array([10.0, 10.0, 10.0]))
        >>> tp.near(2, 5.0, 10.0), tp.near(2, 5.0, 20.0), tp.near(7, 5.0, 100.0)
        (False, True, False)
        >>> TruePath([], np.array([1.0])).length
        0.0
    """

    def __init__(self, path: Sequence[int], seg_len: FloatArray) -> None:
        self.path = [int(s) for s in path]
        lens = np.asarray([seg_len[s] for s in self.path], dtype=np.float64)
        self.start = np.concatenate([[0.0], np.cumsum(lens)])[: len(self.path)]
        self.length = float(lens.sum())
        self._where: dict[int, list[tuple[float, float]]] = {}
        for s, a, n in zip(self.path, self.start.tolist(), lens.tolist(), strict=True):
            self._where.setdefault(s, []).append((a, a + n))

    def near(self, segment: int, path_pos_m: float, tol_m: float) -> bool:
        """Whether ``segment`` occurs on the path within ``tol_m`` of ``path_pos_m``.

        Distance is measured along the path, from the true position to the nearest point
        of the segment's occurrence (0 when the true position lies on it).
        """
        for a, b in self._where.get(int(segment), ()):
            gap = a - path_pos_m if path_pos_m < a else max(0.0, path_pos_m - b)
            if gap <= tol_m:
                return True
        return False


def route_mismatch_fraction(
    true_path: Sequence[int], matched_path: Sequence[int], seg_len: FloatArray
) -> float:
    """Newson & Krumm's route mismatch fraction over directed segments.

    ``(added + subtracted) / true length``, where *added* is the length of matched
    segments that the true path does not contain and *subtracted* the length of true
    segments the matched path misses. Paths are compared as multisets of directed
    segments (a loop driven twice counts twice; the wrong direction of the right road
    counts as both added and subtracted: we score direction, which is stricter than
    comparing undirected roads). Order is ignored, as in the published definition.

    Returns ``nan`` for an empty true path.

    >>> lens = np.array([10.0, 20.0, 30.0, 40.0])
    >>> route_mismatch_fraction([0, 1, 2], [0, 1, 2], lens)
    0.0
    >>> route_mismatch_fraction([0, 1, 2], [0, 3, 2], lens)   # (40 + 20) / 60
    1.0
    >>> route_mismatch_fraction([], [0], lens)
    nan
    """
    true_count = Counter(int(s) for s in true_path)
    match_count = Counter(int(s) for s in matched_path)
    total = float(sum(seg_len[s] * n for s, n in true_count.items()))
    if total <= 0.0:
        return float("nan")
    added = sum(float(seg_len[s]) * max(0, n - true_count[s]) for s, n in match_count.items())
    missed = sum(float(seg_len[s]) * max(0, n - match_count[s]) for s, n in true_count.items())
    return (added + missed) / total
