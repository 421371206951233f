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

import heapq
import itertools
import math
from collections import Counter
from collections.abc import Sequence
from typing import NamedTuple

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


def path_snap_error(
    seg_start: FloatArray,
    seg_end: FloatArray,
    path: Sequence[int],
    path_index: int,
    true_xy: tuple[float, float],
    fix_xy: tuple[float, float],
    reach_m: float = 60.0,
) -> float:
    """Error of an oracle that knows the driven path and snaps the fix onto it, metres.

    The fix is moved to the nearest point of the truly driven path among the segments
    within ``reach_m`` (along the path) of the one driven at the fix's second, and the
    distance from there to the true position is returned. No matcher that reports the
    fix's projection onto the right road can do better on average: what remains is the
    GPS error along the road (for an isotropic Gaussian error of ``sigma`` per axis on a
    straight road, ``|N(0, sigma)|``, median ``0.674 sigma``). It is the floor against
    which a matched-position error target is read (issue #3).

    Args:
        seg_start, seg_end: (E, 2) start and end of every directed segment, metres.
        path: the directed segments driven, in order.
        path_index: index in ``path`` of the segment driven at the fix's second.
        true_xy: the true position; fix_xy: the reported position.
        reach_m: how far along the path, either way, the snap may land.

    Example (a straight road along x, the fix 3 m ahead and 4 m to the side):
        >>> a = np.array([[0.0, 0.0], [10.0, 0.0]]); b = np.array([[10.0, 0.0], [20.0, 0.0]])
        >>> path_snap_error(a, b, [0, 1], 0, (5.0, 0.0), (8.0, 4.0))
        3.0
        >>> path_snap_error(a, b, [0], 0, (5.0, 0.0), (25.0, 0.0))   # clamped to the end
        5.0
    """
    lo = hi = path_index
    gone = 0.0
    while lo > 0 and gone < reach_m:
        lo -= 1
        gone += float(np.hypot(*(seg_end[path[lo]] - seg_start[path[lo]])))
    gone = 0.0
    while hi < len(path) - 1 and gone < reach_m:
        hi += 1
        gone += float(np.hypot(*(seg_end[path[hi]] - seg_start[path[hi]])))
    fx, fy = fix_xy
    best_d, best = math.inf, (fx, fy)
    for s in path[lo:hi + 1]:
        ax, ay = (float(v) for v in seg_start[s])
        bx, by = (float(v) for v in seg_end[s])
        dx, dy = bx - ax, by - ay
        n2 = dx * dx + dy * dy
        t = 0.0 if n2 == 0.0 else min(1.0, max(0.0, ((fx - ax) * dx + (fy - ay) * dy) / n2))
        qx, qy = ax + t * dx, ay + t * dy
        d = math.hypot(fx - qx, fy - qy)
        if d < best_d:
            best_d, best = d, (qx, qy)
    return math.hypot(best[0] - true_xy[0], best[1] - true_xy[1])


def least_cost_route(
    out: Sequence[Sequence[int]],
    seg_to: Sequence[int],
    seg_twin: Sequence[int],
    seg_len: Sequence[float],
    turn_ok: Sequence[bool],
    start: tuple[int, float],
    end: tuple[int, float],
    limit: float = math.inf,
) -> tuple[float, list[int]] | None:
    """The shortest route from one point of the network to another, and its length.

    A point is ``(segment, offset_m)``: ``offset_m`` metres along the directed segment.
    The search is over directed segments (a state is the segment entered), so a route
    may pass a vertex twice (into a dead end and out again); leaving a vertex on the
    twin of the segment that entered it (a U-turn) is allowed only where
    ``turn_ok[vertex]`` (the matcher's rule: ``NetworkView.turn_back_ok``, dead ends and
    intersections). This is the route a matcher that bridges by least route length
    would put between two fixes it knew exactly.

    Args:
        out: per vertex, the segments leaving it.
        seg_to, seg_twin, seg_len: per segment, its head vertex, its opposite-direction
            segment (-1: none) and its length in metres.
        turn_ok: per vertex, whether a U-turn is allowed there.
        start, end: the two points.
        limit: the longest route considered, metres.

    Returns:
        ``(length_m, segments)`` with ``segments`` the route from ``start``'s segment to
        ``end``'s, both included (one segment when ``end`` lies ahead on the same one),
        or None when no route of at most ``limit`` metres exists.

    Example (a 100 m road both ways, segments 0 east and 1 west, dead ends at both
    ends: from 30 m along the way east to 20 m along the way back, via the dead end):
        >>> out, to, twin, lens = [[0], [1]], [1, 0], [1, 0], [100.0, 100.0]
        >>> least_cost_route(out, to, twin, lens, [True, True], (0, 30.0), (1, 20.0))
        (90.0, [0, 1])
        >>> least_cost_route(out, to, twin, lens, [True, True], (0, 30.0), (0, 50.0))
        (20.0, [0])
        >>> least_cost_route(out, to, twin, lens, [False, False], (0, 30.0), (1, 20.0))
    """
    a_seg, a_off = start
    b_seg, b_off = end
    if a_seg == b_seg and b_off >= a_off:
        return (b_off - a_off, [a_seg]) if b_off - a_off <= limit else None
    # entries: (route length to the tail of the segment entered, segment, segment before)
    heap: list[tuple[float, int, int]] = []
    head = float(seg_len[a_seg]) - a_off

    def push(length: float, came: int) -> None:
        v = int(seg_to[came])
        back = int(seg_twin[came]) if not turn_ok[v] else -1
        for f in out[v]:
            if int(f) != back and int(f) not in pred:
                heapq.heappush(heap, (length, int(f), came))

    pred: dict[int, int] = {}
    push(head, a_seg)
    while heap:
        dist, g, before = heapq.heappop(heap)
        if g in pred:
            continue
        pred[g] = before
        if g == b_seg:
            if dist + b_off > limit:
                return None
            route, cur = [g], before
            while cur != a_seg:
                route.append(cur)
                cur = pred[cur]
            route.append(a_seg)
            return dist + b_off, route[::-1]
        nd = dist + float(seg_len[g])
        if nd <= limit:
            push(nd, g)
    return None


class GapRoute(NamedTuple):
    """One gap between consecutive fixes: what was driven and the least-cost route.

    ``driven_m`` is the length truly driven between the two true positions, ``least_m``
    the length of the least-cost route between them (:func:`least_cost_route`), equal
    to ``driven_m`` when no route within ``driven_m`` was found (the driven route breaks
    the turn rule, e.g. a turn in the middle of a road; ``routed`` is then False).
    ``route`` is the segments the oracle puts in the gap, from the earlier fix's true
    segment to the later one's, both included.
    """

    driven_m: float
    least_m: float
    route: tuple[int, ...]
    routed: bool


def oracle_bridges(
    out: Sequence[Sequence[int]],
    seg_to: Sequence[int],
    seg_twin: Sequence[int],
    seg_len: Sequence[float],
    turn_ok: Sequence[bool],
    path: Sequence[int],
    at: Sequence[tuple[int, float, float]],
) -> tuple[list[int], list[GapRoute]]:
    """An oracle's path: every fix's true position, each gap bridged by the least-cost route.

    Also every gap's driven and least-cost length.

    No matcher that puts a least-cost route between its (at best, exactly right) answers
    can do better than this path on a gap the vehicle drove by a longer way (a lap of a
    block, a spur in and out): the fixes at the two ends are all the oracle knows. Its
    route mismatch fraction against the true path is the information limit of bridging.

    Args:
        out, seg_to, seg_twin, seg_len, turn_ok: the network, as in
            :func:`least_cost_route`.
        path: the directed segments truly driven, in order.
        at: per fix, in time order, ``(path_index, offset_m, path_pos_m)`` of its true
            position: the index in ``path`` of the segment driven, the metres along it,
            the metres along the whole path.

    Returns:
        ``(oracle_path, gaps)``: the oracle's segments from the first fix's true segment
        to the last one's (each gap's route after the first appended without its first
        segment, which the gap before ended on), and one :class:`GapRoute` per gap.

    Example (segments 0 -> 1 -> 2 -> 0 form a 30 m loop of 10 m segments; the
    vehicle goes round once more between two fixes, which the oracle cannot see):
        >>> out, to, twin = [[0], [1], [2]], [1, 2, 0], [-1, -1, -1]
        >>> lens, ok = [10.0] * 3, [False] * 3
        >>> path = [0, 1, 2, 0, 1, 2, 0, 1]
        >>> p, gaps = oracle_bridges(out, to, twin, lens, ok, path, [(0, 5.0, 5.0), (7, 5.0, 75.0)])
        >>> p, [(g.driven_m, g.least_m, g.routed) for g in gaps]
        ([0, 1], [(70.0, 10.0, True)])
    """
    oracle: list[int] = [int(path[at[0][0]])] if at else []
    gaps: list[GapRoute] = []
    for (ia, oa, pa), (ib, ob, pb) in itertools.pairwise(at):
        driven = pb - pa
        found = least_cost_route(out, seg_to, seg_twin, seg_len, turn_ok,
                                 (int(path[ia]), oa), (int(path[ib]), ob),
                                 limit=driven + 1e-6)
        if found is None:
            gap = GapRoute(driven, driven, tuple(int(s) for s in path[ia:ib + 1]), False)
        else:
            gap = GapRoute(driven, min(driven, found[0]), tuple(found[1]), True)
        gaps.append(gap)
        oracle.extend(gap.route[1:])
    return oracle, gaps


def point_oracle(
    out: Sequence[Sequence[int]],
    seg_to: Sequence[int],
    seg_twin: Sequence[int],
    seg_len: Sequence[float],
    turn_ok: Sequence[bool],
    path: Sequence[int],
    at: Sequence[tuple[int, float, float]],
) -> tuple[list[int], list[int]]:
    """An oracle that knows every fix's true point but not the direction of travel.

    A fix says where the vehicle was, not which way it was heading: on a two-way road the
    true segment and its twin pass through the same point. This oracle picks, for every
    fix, the true segment or its twin (at the same point) so that the sum of the
    least-cost routes between consecutive fixes is smallest (a Viterbi search over the
    two states per fix), ties going to the truth, and every route no longer than the
    one truly driven (longer alternatives are dropped, which can only help it). Where a
    vehicle circles a loop of length ``C`` and covers ``d`` with ``C / 2 < d < C``
    between fixes, going the other way round by ``C - d`` is the shorter reading of the
    same points (the stroboscopic effect of sampling a periodic motion): no matcher that
    sees only positions and prefers short routes can tell the two apart.

    Args: as :func:`oracle_bridges`.

    Returns:
        ``(oracle_path, segments)``: the path as in :func:`oracle_bridges` and the
        segment chosen at every fix.

    Example (a two-way 100 m road with dead ends: the truth drives east 10 -> 60 m;
    going west from the twin would need a turn at the dead end, so the truth wins):
        >>> out, to, twin, lens = [[0], [1]], [1, 0], [1, 0], [100.0, 100.0]
        >>> point_oracle(out, to, twin, lens, [True, True], [0], [(0, 10.0, 10.0), (0, 60.0, 60.0)])
        ([0], [0, 0])
    """
    if not at:
        return [], []
    states: list[list[tuple[int, float]]] = []
    for ia, off, _ in at:
        seg = int(path[ia])
        tw = int(seg_twin[seg])
        states.append([(seg, off)] + ([(tw, float(seg_len[tw]) - off)] if tw >= 0 else []))
    cost = [0.0] * len(states[0])
    back: list[list[tuple[int, tuple[int, ...]]]] = []
    for j in range(1, len(at)):
        limit = at[j][2] - at[j - 1][2] + 1e-6
        new_cost = [math.inf] * len(states[j])
        new_back: list[tuple[int, tuple[int, ...]]] = [(-1, ())] * len(states[j])
        for b, end in enumerate(states[j]):
            for a, start in enumerate(states[j - 1]):
                if math.isinf(cost[a]):
                    continue
                found = least_cost_route(out, seg_to, seg_twin, seg_len, turn_ok, start, end,
                                         limit)
                if found is None:
                    continue
                c = cost[a] + found[0]
                # ties to the truth (state 0) and to the true predecessor
                if c < new_cost[b] - 1e-6:
                    new_cost[b], new_back[b] = c, (a, tuple(found[1]))
        if all(math.isinf(c) for c in new_cost):
            # nothing within the driven length (a turn the rule forbids): the truth
            a = 0 if not math.isinf(cost[0]) else cost.index(min(cost))
            new_cost[0] = cost[a]
            new_back[0] = (a, tuple(int(s) for s in path[at[j - 1][0]:at[j][0] + 1]))
        cost = new_cost
        back.append(new_back)
    best = min(range(len(cost)), key=lambda i: (cost[i] - (1e-6 if i == 0 else 0.0), i))
    chosen = [best]
    routes: list[tuple[int, ...]] = []
    for j in range(len(at) - 1, 0, -1):
        a, route = back[j - 1][chosen[-1]]
        routes.append(route)
        chosen.append(a)
    chosen.reverse()
    routes.reverse()
    segs = [states[j][c][0] for j, c in enumerate(chosen)]
    oracle = [segs[0]]
    for route in routes:
        oracle.extend(route[1:])
    return oracle, segs


def pieces_at_marks(path: Sequence[int],
                    marks: Sequence[tuple[int, int]]) -> list[tuple[int, list[int]]]:
    """Split a path at the segments of the fixes it passes, in order.

    ``marks`` is ``(key, segment)`` per fix, in time order (``key`` is the caller's, e.g.
    the fix's index). Each mark is looked for from where the one before was found,
    forwards (the first occurrence of its segment, so two fixes on one segment share
    its occurrence, as two fixes a few metres apart do); a mark not found is skipped. Piece
    ``key`` runs from its mark's segment up to (not including) the next found mark's
    segment, the last one to the end of the path; segments before the first found mark
    come first under key ``-1`` (only when there are any). So a fix's own segment is in
    the piece that starts at that fix, and the pieces put together are ``path``.

    >>> pieces_at_marks([5, 6, 7, 8, 9], [(0, 6), (1, 8)])
    [(-1, [5]), (0, [6, 7]), (1, [8, 9])]
    >>> pieces_at_marks([5, 6, 5, 6], [(0, 5), (1, 5), (2, 3)])   # 3 not on the path
    [(0, []), (1, [5, 6, 5, 6])]
    """
    found: list[tuple[int, int]] = []
    at = 0
    for key, seg in marks:
        for q in range(at, len(path)):
            if int(path[q]) == int(seg):
                found.append((key, q))
                at = q
                break
    out: list[tuple[int, list[int]]] = []
    first = found[0][1] if found else len(path)
    if first > 0:
        out.append((-1, [int(s) for s in path[:first]]))
    for k, (key, q) in enumerate(found):
        end = found[k + 1][1] if k + 1 < len(found) else len(path)
        out.append((key, [int(s) for s in path[q:end]]))
    return out


def mismatch_by_gap(
    truth: dict[int, list[int]], matched: dict[int, list[int]]
) -> dict[int, tuple[Counter[int], Counter[int]]]:
    """Put the route mismatch of a whole drive on the gaps between fixes.

    ``truth`` and ``matched`` give, per gap key, the segments driven and the segments
    matched there. The measure (:func:`route_mismatch_fraction`) compares the whole
    paths as multisets: a segment added is one the matched path has more often than the
    true path, over the whole drive. Each added occurrence is put on a gap whose own
    matched count of that segment exceeds its own true count (there are always enough:
    the excess over the drive is at most the sum of the gaps' excesses), missed ones
    alike; so the gaps' added and missed lengths add up to the measure's. What a gap has
    in excess that another gap makes up (a segment matched one gap early) is on no gap.

    Returns ``{key: (added, missed)}`` with every key of either input.

    >>> got = mismatch_by_gap({0: [1, 2], 1: [3]}, {0: [1], 1: [2, 4]})
    >>> {k: (sorted(a.elements()), sorted(m.elements())) for k, (a, m) in got.items()}
    {0: ([], []), 1: ([4], [3])}
    """
    keys = sorted(set(truth) | set(matched))
    tc = {k: Counter(truth.get(k, ())) for k in keys}
    mc = {k: Counter(matched.get(k, ())) for k in keys}
    t_all: Counter[int] = Counter()
    m_all: Counter[int] = Counter()
    for k in keys:
        t_all.update(tc[k])
        m_all.update(mc[k])
    out: dict[int, tuple[Counter[int], Counter[int]]] = {k: (Counter(), Counter())
                                                         for k in keys}
    for side, mine, other, total, ref in ((0, mc, tc, m_all, t_all), (1, tc, mc, t_all, m_all)):
        for s, n in total.items():
            left = n - ref[s]
            for k in keys:
                if left <= 0:
                    break
                extra = mine[k][s] - other[k][s]
                if extra > 0:
                    take = min(extra, left)
                    out[k][side][s] += take
                    left -= take
    return out
