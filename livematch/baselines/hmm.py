"""A hidden-Markov-model map matcher after Newson & Krumm (ACM SIGSPATIAL GIS 2009).

Written from the published method of P. Newson and J. Krumm, "Hidden Markov Map Matching
Through Noise and Sparseness", ACM SIGSPATIAL GIS 2009 (the values quoted below are
from memory of that paper, not re-checked against it):

- **States** are candidate positions on the road: the projection of a fix onto each
  segment within ``radius_m`` (the paper uses 200 m; we default to 50 m and keep the
  ``max_candidates`` nearest, for speed; both are settings).
- **Emission**: a zero-mean Gaussian on the fix-to-candidate distance with standard
  deviation ``sigma_z`` (the paper estimated 4.07 m from its data, by the median absolute
  deviation rule ``sigma_z = 1.4826 * median(distance)``; see :func:`estimate_sigma_z`).
- **Transition**: exponential in ``|great-circle distance between the fixes - route
  distance between the candidates|`` with scale ``beta``. The paper estimates beta from
  ground truth as ``median(|difference|) / ln 2`` (the median of an exponential
  distribution is ``beta ln 2``; :func:`estimate_beta`); its value depends on the sampling
  interval, so it is a setting here (default 3 m, a 1 Hz-ish value from memory). Our
  distances are in the network's local projection, which is within 0.1 % of the
  great-circle distance over a city (see :class:`~livematch.core.geometry.Projection`).
- **Route distances** by Dijkstra on the directed segment graph from each previous
  candidate, bounded by ``route_slack_m + route_factor * distance between the fixes``;
  a candidate farther than that along the roads is unreachable (the paper likewise drops
  transitions with implausibly long routes).
- **Preprocessing** (paper): a fix within ``2 sigma_z`` of the previous kept fix is not
  a new HMM step; it takes the segment chosen for that step (this removes the jitter of
  a stopped vehicle), placed at its own projection onto that segment.
- **Breaks**: a fix with no candidate, or whose candidates are all unreachable from the
  previous step, ends the chain (everything pending is decided) and the next fix with
  candidates starts a new one. (For the path only, the new chain's first decision is
  joined to the old chain's last by a bounded shortest route when there is one.)

Our additions, not in the paper: a candidate a little *behind* the previous one on the
same or the directly preceding segment (``backtrack_m``) is treated as standing still
rather than as a trip around the block; and the matcher is online with a fixed lag: the
*live* answer of a fix is the best state when it arrives (lag 0); its *final* answer is
decided when ``lag`` more steps have arrived, by Viterbi back-tracking from the best
state then (or at a break / :meth:`HmmMatcher.flush`, from the best state at the end).
"""

from __future__ import annotations

import heapq
import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

from livematch.baselines.result import Matched, TraceMatch, project_point
from livematch.core.network import RoadNetwork

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]


@dataclass(frozen=True, kw_only=True)
class HmmSettings:
    """Parameters of the HMM matcher. Units: metres.

    Attributes:
        sigma_z: emission standard deviation (paper: 4.07 m, from memory).
        beta: transition scale (paper: estimated per sampling interval; see module doc).
        radius_m: candidate search radius (paper: 200 m; smaller here for speed).
        max_candidates: keep at most this many nearest candidates per fix.
        lag: fixed lag in HMM steps before a fix's answer is final (0 = decide at once).
        min_move_m: fixes closer than this to the previous kept fix are not new steps
            (paper: 2 sigma_z); None means ``2 * sigma_z``.
        route_factor, route_slack_m: the Dijkstra cutoff is
            ``route_slack_m + route_factor * distance between the two fixes``.
        backtrack_m: how far behind the previous candidate a new one may lie and still
            count as standing still (our addition; 0 disables it).
        max_speed_mps, speed_slack_m: when fixes carry times, the route cutoff is also
            at most ``speed_slack_m + max_speed_mps * time between the fixes`` (our
            addition: without it a single outlier fix 200 m off pulls the path into a
            loop around the block, because every path must pass some candidate of it).
    """

    sigma_z: float = 4.07
    beta: float = 3.0
    radius_m: float = 50.0
    max_candidates: int = 8
    lag: int = 5
    min_move_m: float | None = None
    route_factor: float = 3.0
    route_slack_m: float = 200.0
    backtrack_m: float = 10.0
    max_speed_mps: float = 40.0
    speed_slack_m: float = 50.0


def estimate_sigma_z(distances: Sequence[float]) -> float:
    """Newson & Krumm's robust estimate of sigma_z: ``1.4826 * median(|distance|)``.

    ``distances`` are fix-to-true-road distances, metres (1.4826 makes the median
    absolute deviation a consistent estimate of a Gaussian's standard deviation).

    >>> round(estimate_sigma_z([1.0, 2.0, 3.0]), 4)
    2.9652
    """
    return 1.4826 * float(np.median(np.abs(np.asarray(distances, dtype=np.float64))))


def estimate_beta(differences: Sequence[float]) -> float:
    """Newson & Krumm's estimate of beta: ``median(|gc - route|) / ln 2``.

    ``differences`` are, for consecutive fixes, the distance between the fixes minus the
    route distance between the true positions, metres.

    >>> round(estimate_beta([math.log(2.0)]), 6)
    1.0
    """
    return float(np.median(np.abs(np.asarray(differences, dtype=np.float64)))) / math.log(2.0)


@dataclass
class _Step:
    """One HMM step: a kept fix, its candidates, Viterbi scores and back-pointers."""

    fixes: list[int]
    x: float
    y: float
    t: float | None
    cands: list[Matched]
    score: FloatArray
    back: IntArray
    link: list[list[int] | None] = field(default_factory=list)
    merged: dict[int, tuple[float, float]] = field(default_factory=dict)


class HmmMatcher:
    """Online fixed-lag HMM matcher for one vehicle.

    Feed fixes in time order with :meth:`update` (returns the live answer); final
    answers appear in :attr:`final` (by fix number) as they are decided, and the settled
    path grows in :attr:`path`. Call :meth:`flush` at the end of the trace.

    Example (a straight two-way street, fixes 1 m off the road):
        >>> from livematch.core.geometry import Projection
        >>> net = RoadNetwork(Projection.local(0, 0),
        ...     np.array([[0.0, 0], [100, 0], [200, 0]]), np.array([1, 2, 3]),
        ...     np.array([0, 1, 1, 2]), np.array([1, 2, 0, 1]), np.array([7, 7, 7, 7]),
        ...     np.array([0, 0, 0, 0]), [{"highway": "residential"}])
        >>> m = HmmMatcher(net, HmmSettings(lag=1))
        >>> [m.update(x, 1.0).segment for x in (20.0, 70.0, 120.0, 170.0)]
        [0, 0, 1, 1]
        >>> m.flush(); m.path
        [0, 1]
        >>> HmmMatcher(net).update(1000.0, 1000.0) is None   # no road near: no answer
        True
    """

    def __init__(self, network: RoadNetwork, settings: HmmSettings | None = None) -> None:
        self.network = network
        self.settings = settings or HmmSettings()
        s = self.settings
        self._min_move = 2.0 * s.sigma_z if s.min_move_m is None else s.min_move_m
        self._out_ptr = network.out_ptr.tolist()
        self._out_seg = network.out_seg.tolist()
        self._seg_to = network.seg_to.tolist()
        self._seg_from = network.seg_from.tolist()
        self._seg_len = network.seg_len.tolist()
        self._twin = network.seg_twin.tolist()
        self._chain: list[_Step] = []
        self._decided = 0  # steps of the chain already decided
        self._last_choice: tuple[_Step, int] | None = None  # last decided step and state
        self._n_fixes = 0
        self.final: dict[int, Matched | None] = {}
        self.path: list[int] = []

    # ---------------------------------------------------------------- public
    def update(self, x: float, y: float, t: float | None = None) -> Matched | None:
        """Take the next fix; return its live answer (the best state now, lag 0).

        ``x``, ``y`` are projected metres; ``t`` (seconds) enables the speed bound.
        """
        i = self._n_fixes
        self._n_fixes += 1
        if self._chain:
            last = self._chain[-1]
            if math.hypot(x - last.x, y - last.y) < self._min_move:
                last.fixes.append(i)
                last.merged[i] = (x, y)
                if self._decided == len(self._chain):  # that step is already final
                    decided = self.final[last.fixes[0]]
                    assert decided is not None
                    self.final[i] = project_point(self.network, decided.segment, x, y)
                best = last.cands[int(np.argmax(last.score))]
                return project_point(self.network, best.segment, x, y)
        cands = self._candidates(x, y)
        if not cands:
            self._finish_chain()
            self.final[i] = None
            return None
        emission = np.array([-0.5 * (c.distance_m / self.settings.sigma_z) ** 2
                             for c in cands])
        step: _Step | None
        if not self._chain:
            step = _Step([i], x, y, t, cands, emission,
                         np.full(len(cands), -1, np.int64), [None] * len(cands))
        else:
            step = self._transition(self._chain[-1], x, y, t, cands, emission)
            if step is None:
                self._finish_chain()
                step = _Step([i], x, y, t, cands, emission,
                             np.full(len(cands), -1, np.int64), [None] * len(cands))
            else:
                step.fixes.append(i)
        step.score = step.score - step.score.max()
        self._chain.append(step)
        if len(self._chain) - 1 - self._decided >= self.settings.lag:
            self._decide_upto(len(self._chain) - 1 - self.settings.lag)
        return cands[int(np.argmax(step.score))]

    def flush(self) -> None:
        """End of trace: decide every pending fix from the best final state."""
        self._finish_chain()

    # ---------------------------------------------------------------- steps
    def _candidates(self, x: float, y: float) -> list[Matched]:
        net = self.network
        near = net.segments_near(x, y, self.settings.radius_m)
        if len(near) == 0:
            return []
        a = net.node_xy[net.seg_from[near]]
        d = net.node_xy[net.seg_to[near]] - a
        len2 = np.einsum("ij,ij->i", d, d)
        with np.errstate(invalid="ignore", divide="ignore"):
            f = np.where(len2 > 0, np.einsum("ij,ij->i", np.array([x, y]) - a, d) / len2, 0.0)
        f = np.clip(f, 0.0, 1.0)
        q = a + f[:, None] * d
        dist = np.hypot(q[:, 0] - x, q[:, 1] - y)
        order = np.argsort(dist, kind="stable")[: self.settings.max_candidates]
        return [Matched(int(near[k]), float(f[k] * net.seg_len[near[k]]), float(q[k, 0]),
                        float(q[k, 1]), float(dist[k])) for k in order]

    def _transition(
        self, prev: _Step, x: float, y: float, t: float | None, cands: list[Matched],
        emission: FloatArray,
    ) -> _Step | None:
        """Viterbi step from ``prev``; None when no candidate is reachable (a break)."""
        s = self.settings
        gc = math.hypot(x - prev.x, y - prev.y)
        cutoff = s.route_slack_m + s.route_factor * gc
        if t is not None and prev.t is not None:
            cutoff = min(cutoff, s.speed_slack_m + s.max_speed_mps * max(0.0, t - prev.t))
        targets = {self._seg_from[c.segment] for c in cands}
        n = len(cands)
        score = np.full(n, -np.inf)
        back = np.full(n, -1, np.int64)
        link: list[list[int] | None] = [None] * n
        searches: dict[int, tuple[dict[int, float], dict[int, int]]] = {}
        for pi, p in enumerate(prev.cands):
            if not np.isfinite(prev.score[pi]):
                continue
            head = self._seg_to[p.segment]
            if head not in searches:
                searches[head] = self._dijkstra(head, targets, cutoff)
            dist, pred = searches[head]
            for ci, c in enumerate(cands):
                route, via = self._route(p, c, dist, pred, cutoff)
                if route is None:
                    continue
                v = prev.score[pi] - abs(gc - route) / s.beta
                if v > score[ci]:
                    score[ci], back[ci], link[ci] = v, pi, via
        if not np.any(np.isfinite(score)):
            return None
        return _Step([], x, y, t, cands, score + emission, back, link)

    def _route(
        self, p: Matched, c: Matched, dist: dict[int, float], pred: dict[int, int],
        cutoff: float,
    ) -> tuple[float | None, list[int] | None]:
        """Route distance from candidate p to c and the segments appended to the path."""
        bt = self.settings.backtrack_m
        plen = self._seg_len[p.segment]
        if c.segment == p.segment:
            if c.offset_m >= p.offset_m:
                return c.offset_m - p.offset_m, []
            if p.offset_m - c.offset_m <= bt:
                return p.offset_m - c.offset_m, []
        elif (self._seg_to[c.segment] == self._seg_from[p.segment]
              and c.segment != self._twin[p.segment]):
            back = p.offset_m + self._seg_len[c.segment] - c.offset_m
            if back <= bt:
                return back, []
        tail = self._seg_from[c.segment]
        if tail not in dist:
            return None, None
        route = plen - p.offset_m + dist[tail] + c.offset_m
        if route > cutoff:
            return None, None
        via: list[int] = []
        v = tail
        while v in pred:
            seg = pred[v]
            via.append(seg)
            v = self._seg_from[seg]
        via.reverse()
        via.append(c.segment)
        return route, via

    def _dijkstra(
        self, source: int, targets: set[int], cutoff: float
    ) -> tuple[dict[int, float], dict[int, int]]:
        """Road distances from vertex ``source`` to the ``targets`` within ``cutoff``.

        Returns settled distances and, per reached vertex, the segment it was reached by.
        Stops as soon as every target is settled.
        """
        dist: dict[int, float] = {source: 0.0}
        pred: dict[int, int] = {}
        settled: dict[int, float] = {}
        remaining = set(targets)
        heap = [(0.0, source)]
        out_ptr, out_seg, seg_to, seg_len = (self._out_ptr, self._out_seg, self._seg_to,
                                             self._seg_len)
        while heap and remaining:
            d, v = heapq.heappop(heap)
            if v in settled:
                continue
            settled[v] = d
            remaining.discard(v)
            for k in range(out_ptr[v], out_ptr[v + 1]):
                seg = out_seg[k]
                w = seg_to[seg]
                nd = d + seg_len[seg]
                if nd <= cutoff and nd < dist.get(w, math.inf) and w not in settled:
                    dist[w] = nd
                    pred[w] = seg
                    heapq.heappush(heap, (nd, w))
        return settled, {v: pred[v] for v in settled if v in pred}

    # ---------------------------------------------------------------- decisions
    def _decide_upto(self, upto: int) -> None:
        """Decide chain steps ``_decided .. upto``, back-tracking from the newest best."""
        chain = self._chain
        state = int(np.argmax(chain[-1].score))
        states = [0] * len(chain)
        states[-1] = state
        for k in range(len(chain) - 1, self._decided, -1):
            state = int(chain[k].back[state])
            states[k - 1] = state
        for k in range(self._decided, upto + 1):
            self._choose(chain[k], states[k])
        self._decided = upto + 1

    def _choose(self, step: _Step, state: int) -> None:
        m = step.cands[state]
        for i in step.fixes:
            xy = step.merged.get(i)
            self.final[i] = m if xy is None else project_point(self.network, m.segment, *xy)
        if self._last_choice is not None:
            prev_step, prev_state = self._last_choice
            linked = int(step.back[state]) == prev_state and prev_step is not step
            via = step.link[state] if linked else None
            if via is None:
                dt = (None if step.t is None or prev_step.t is None
                      else max(0.0, step.t - prev_step.t))
                via = self._reconnect(prev_step.cands[prev_state], m, dt)
            self.path.extend(via)
        else:
            self.path.append(m.segment)
        self._last_choice = (step, state)

    def _reconnect(self, p: Matched, c: Matched, dt: float | None) -> list[int]:
        """Segments joining two decided states the back-pointers do not join.

        Fixed-lag decisions need not be consistent with each other. Two decisions on the
        same segment, or the newer one on the segment just before, mean "no progress"
        (not a trip round the block); otherwise the shortest route within the usual cutoff
        joins them, and without one the path has a gap.
        """
        if p.segment == c.segment or self._seg_to[c.segment] == self._seg_from[p.segment]:
            return []
        s = self.settings
        head, tail = self._seg_to[p.segment], self._seg_from[c.segment]
        cutoff = s.route_slack_m + s.route_factor * math.hypot(c.x - p.x, c.y - p.y)
        if dt is not None:
            cutoff = min(cutoff, s.speed_slack_m + s.max_speed_mps * dt)
        dist, pred = self._dijkstra(head, {tail}, cutoff)
        _, via = self._route(p, c, dist, pred, cutoff)
        return via if via is not None else [c.segment]

    def _finish_chain(self) -> None:
        if self._chain and self._decided < len(self._chain):
            self._decide_upto(len(self._chain) - 1)
        self._chain = []
        self._decided = 0
        # _last_choice stays: the next chain's first decision is joined to it by routing
        # when a short route exists (so a break does not cut the path needlessly).


def match_hmm(
    network: RoadNetwork, xy: Sequence[tuple[float, float]], settings: HmmSettings | None = None,
    times: Sequence[float] | None = None,
) -> TraceMatch:
    """Run :class:`HmmMatcher` over a whole trace and collect live and final answers.

    ``times`` (seconds, one per fix) enables the speed bound on routes.
    """
    matcher = HmmMatcher(network, settings)
    ts: Sequence[float | None] = times if times is not None else [None] * len(xy)
    live = [matcher.update(x, y, t) for (x, y), t in zip(xy, ts, strict=True)]
    matcher.flush()
    return TraceMatch(live, [matcher.final.get(i) for i in range(len(xy))], matcher.path)
