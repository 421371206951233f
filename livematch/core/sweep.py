"""One level of the online Fréchet sweep: a trace against the whole road graph at one eps.

The free space between the trace and the road graph (Alt, Efrat, Rote & Wenk, "Matching
planar maps", J. Algorithms 2003) is swept one trace segment p_i -> p_{i+1} at a time.
Positions on a segment e = (a, b) are parameters x in [0, 1]; positions on the trace
segment are parameters s in [0, 1].

* The *free interval* of e at a fix p is {x : |a + x (b - a) - p| <= eps}; a disc meets a
  segment in one interval, so it is a quadratic's roots clipped to [0, 1].
* The *white interval* of a vertex v on the trace segment is {s : |p_i + s (p_{i+1} - p_i)
  - v| <= eps}.
* A *state* is a segment with its lowest reachable position ``low`` at the current fix:
  every x from ``low`` to the top of the free interval is reachable (convexity of the free
  space in one cell).

One step (:func:`sweep_step`):

1. Along the same segment: ``max(low, lo')`` stays reachable if it is inside the new free
   interval [lo', hi']; the head vertex is reached in this column at the start of its
   white interval.
2. Through vertices, in order of the column parameter s (a Dijkstra on s): a vertex
   reached at s_v makes the whole free interval of each out-segment (v, w) reachable and
   reaches w at ``max(s_v, start of w's white interval)`` when that is inside it.
3. Each segment keeps the lowest reachable position (for feasibility) and one
   back-pointer: the cheapest way it was reached (for the reported path).

Cost of a step: O(k log k) for the k segments and vertices within eps of the new trace
segment; candidates come from the live states' adjacency, the spatial index is used
only by :func:`fresh_start` and :func:`bridge_step`.

The back-pointers form a tree of candidate paths (:class:`Node`). Among the paths the
decision keeps alive, the reported one minimises a cost in the spirit of Newson & Krumm
(2009): squared distance from fix to matched point over 2 sigma^2, plus the mismatch
between route length and straight-line step length over beta, plus a charge per U-turn,
plus a motion term (the matched point should move as the fixes moved). In bridged steps
(a gap, or a window that died) one more term compares the route length with the
length the candidate's own previous step predicts at the same speed (:func:`pace`): with
15-30 s between fixes the route-against-chord term alone prefers "stood still" to "drove
into the dead end and came back", because the chord of a U-turn is short. Using speed in
the transition follows the temporal analysis of ST-Matching (Lou et al., "Map-matching
for low-sampling-rate GPS trajectories", ACM SIGSPATIAL GIS 2009; from memory), which
compares with speed limits; here the reference speed is the candidate's own.
The Fréchet decision says *which* paths are possible; the cost only orders them.
"""

from __future__ import annotations

import heapq
import math
from bisect import bisect_left
from collections.abc import Callable, Collection, Iterable, Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Final, NamedTuple

from livematch.core.network import RoadNetwork
from livematch.core.routing import (
    INFO_STRIDE,
    RouteSearch,
    RouteTable,
    Search,
    route_searches,
    route_table,
)
from livematch.core.settings import MatchSettings
from livematch.core.view import NetworkView


class Node:
    """One candidate state: a segment at one fix, with a back-pointer to its parent.

    Attributes:
        seg: segment index.
        seq: the tracker's sequence number of the fix.
        t: the fix time (epoch s).
        pos: the reported position on the segment, a parameter in [0, 1]: the fix's
            projection clamped into the reachable part of the free interval.
        x, y: the matched point (metres).
        parent: the state this one was reached from (None for a root).
        via: segments driven strictly between ``parent.seg`` and ``seg``.
        cost: accumulated cost of the path ending here (lower is better).
        low: lowest reachable position on ``seg`` (over every way of reaching it).
    """

    __slots__ = ("cost", "low", "parent", "pos", "seg", "seq", "t", "via", "x", "y")

    def __init__(
        self, seg: int, seq: int, t: float, pos: float, x: float, y: float,
        parent: Node | None, via: tuple[int, ...], cost: float, low: float,
    ) -> None:
        self.seg = seg
        self.seq = seq
        self.t = t
        self.pos = pos
        self.x = x
        self.y = y
        self.parent = parent
        self.via = via
        self.cost = cost
        self.low = low

    def __repr__(self) -> str:
        return f"Node(seg={self.seg}, seq={self.seq}, pos={self.pos:.3f}, cost={self.cost:.2f})"


@dataclass(frozen=True, slots=True)
class StepContext:
    """Everything one step needs besides the states: the two fixes and the cost weights."""

    view: NetworkView
    eps: float
    x0: float
    y0: float
    x1: float
    y1: float
    seq: int
    t: float
    chord: float
    inv_two_sigma2: float
    inv_beta: float
    turn_back_cost: float
    motion_cost: float = 0.0
    pace_cost: float = 0.0
    street_turns: bool = False
    street_turn_cost: float = 0.0
    turn_near: bool = False
    error_rho: float = 0.0
    # the pace term charges nothing in this step (MatchSettings.stand_pace: the fixes
    # show a stand); pace_cost still sets how far the search reaches (bridge_reach)
    pace_free: bool = False
    error_cross: bool = False
    speed_route: float = -1.0
    # metres a state that stays on its segment may be reported behind its parent
    # (MatchSettings.no_roll_back, roll_back_slack_m; the sweep only, see sweep_step);
    # negative: no limit (the rule off)
    roll_back: float = -1.0

    @classmethod
    def between(
        cls, view: NetworkView, settings: MatchSettings, eps: float,
        x0: float, y0: float, x1: float, y1: float, seq: int, t: float, stood: bool = False,
        turn_near: bool = False,
    ) -> StepContext:
        """The context of the step p0 -> p1 at one eps, with the cost weights of ``settings``.

        ``stood``: the vehicle stood at p0 (its step into p0 was slower than
        ``livematch.core.tracker.STOOD_MPS``); with ``settings.stop_turns`` a bridged
        step may then turn round at any vertex, as with ``settings.street_turns``.
        ``turn_near``: a bridged step may turn round where each live state's segment
        ends, when that vertex lies within eps of p0, and nowhere else in the street
        (``settings.reverse_turns_near``; :func:`bridge_step`).
        """
        return cls(view, eps, x0, y0, x1, y1, seq, t, math.hypot(x1 - x0, y1 - y0),
                   1.0 / (2.0 * settings.sigma_m * settings.sigma_m), 1.0 / settings.beta_m,
                   settings.turn_back_cost, 1.0 / settings.motion_m, 1.0 / settings.pace_m,
                   settings.street_turns or (stood and settings.stop_turns),
                   settings.street_turn_cost, turn_near,
                   roll_back=settings.roll_back_slack_m if settings.no_roll_back else -1.0)


def free_interval(
    ax: float, ay: float, bx: float, by: float, px: float, py: float, eps2: float
) -> tuple[float, float]:
    """Parameters x in [0, 1] with |a + x (b - a) - p|^2 <= eps2, as (lo, hi); lo > hi if none."""
    dx = bx - ax
    dy = by - ay
    fx = ax - px
    fy = ay - py
    a = dx * dx + dy * dy
    c = fx * fx + fy * fy - eps2
    if a <= 0.0:
        return (0.0, 1.0) if c <= 0.0 else (1.0, 0.0)
    b = fx * dx + fy * dy
    disc = b * b - a * c
    if disc < 0.0:
        return (1.0, 0.0)
    root = math.sqrt(disc)
    lo = (-b - root) / a
    hi = (-b + root) / a
    return (lo if lo > 0.0 else 0.0, hi if hi < 1.0 else 1.0)


def _offer(
    new: dict[int, Node], ctx: StepContext, seg: int, lo: float, hi: float,
    parent: Node | None, via: tuple[int, ...], floor: float = -1.0, expect: float = -1.0,
) -> None:
    """Record that ``seg`` is reachable on [lo, hi] from ``parent`` through ``via``.

    The reported position is the fix's projection clamped into [max(lo, floor), hi]:
    ``floor`` keeps a vehicle that stays on one segment from being reported as rolling
    backwards (the decision alone would allow it, lagging within eps). ``expect`` >= 0
    adds the pace term: |route - expect| times ``ctx.pace_cost``, where ``expect`` is
    the route length the parent's own speed predicts (:func:`pace`). Only
    :func:`bridge_step` passes it; the sweep (and its compiled twin) never does.
    """
    view = ctx.view
    node = new.get(seg)
    if node is not None and lo >= node.low and parent is not None and parent.cost >= node.cost:
        return  # every term of the cost is >= 0: this way cannot do better
    ax, ay, dx, dy = _frame(view, seg)
    length2 = dx * dx + dy * dy
    pos = ((ctx.x1 - ax) * dx + (ctx.y1 - ay) * dy) / length2 if length2 > 0.0 else lo
    bottom = lo if lo > floor else (floor if floor < hi else hi)
    pos = bottom if pos < bottom else (hi if pos > hi else pos)
    mx = ax + pos * dx
    my = ay + pos * dy
    ex = mx - ctx.x1
    ey = my - ctx.y1
    rho = ctx.error_rho
    if rho > 0.0 and parent is not None and ctx.error_cross:
        cost = _cross_term(view, ctx, parent, ex, ey, dx, dy, length2)
    elif rho > 0.0 and parent is not None:
        # correlated error (settings.bridge_error_corr): charge the part of this offset
        # that the parent's offset at p0 does not explain (AR(1), rho = exp(-dt / tau))
        ex -= rho * (parent.x - ctx.x0)
        ey -= rho * (parent.y - ctx.y0)
        cost = (ex * ex + ey * ey) * ctx.inv_two_sigma2 / (1.0 - rho * rho)
    else:
        cost = (ex * ex + ey * ey) * ctx.inv_two_sigma2
    if parent is not None:
        slen = view.slen
        if not via and seg == parent.seg:
            # signed: rolling back along a segment counts against the step, not for it
            route = (pos - parent.pos) * slen[seg]
        else:
            route, turns, street = _route_turns(
                view, parent, via, seg, (1.0 - parent.pos) * slen[parent.seg] + pos * slen[seg])
            cost += turns * ctx.turn_back_cost + street * ctx.street_turn_cost
        cost += parent.cost + abs(route - ctx.chord) * ctx.inv_beta
        if ctx.speed_route >= 0.0:
            # settings.speed_pace_m: only a route shorter than the reported speeds'
            # least distance driven is charged
            if route < expect:
                cost += (expect - route) * ctx.pace_cost
        elif expect >= 0.0:
            cost += abs(route - expect) * ctx.pace_cost
        if ctx.motion_cost > 0.0:
            # The matched point should move as the fixes moved: consecutive GNSS errors
            # are strongly correlated, so the observed step is accurate even when each
            # fix is not. Separates the road ahead from a side branch at a junction.
            ux = (mx - parent.x) - (ctx.x1 - ctx.x0)
            uy = (my - parent.y) - (ctx.y1 - ctx.y0)
            cost += math.sqrt(ux * ux + uy * uy) * ctx.motion_cost
    _keep(new, node, ctx, seg, pos, mx, my, parent, via, cost, lo)


def _frame(view: NetworkView, seg: int) -> tuple[float, float, float, float]:
    """Segment ``seg``'s tail (x, y) and its vector to the head, in metres."""
    a = view.sf[seg]
    b = view.st[seg]
    ax = view.vx[a]
    ay = view.vy[a]
    return ax, ay, view.vx[b] - ax, view.vy[b] - ay


def _route_turns(
    view: NetworkView, parent: Node, via: tuple[int, ...], seg: int, route: float,
) -> tuple[float, int, int]:
    """The route from ``parent`` through ``via`` into ``seg``, and its U-turns.

    ``route`` holds the parent's rest of its segment plus the part of ``seg`` driven; the
    vias' lengths are added in order (the same float sum wherever it is called). Returns
    (route, U-turns, U-turns where the network has none: only bridged steps with
    ``ctx.street_turns`` make those).
    """
    slen = view.slen
    twin = view.twin
    ok = view.turn_back_ok
    head = view.st
    prev = parent.seg
    turns = 0
    street = 0
    for v in via:
        route += slen[v]
        if v == twin[prev]:
            turns += 1
            street += not ok[head[prev]]
        prev = v
    if seg == twin[prev]:
        turns += 1
        street += not ok[head[prev]]
    return route, turns, street


def _keep(
    new: dict[int, Node], node: Node | None, ctx: StepContext, seg: int, pos: float,
    mx: float, my: float, parent: Node | None, via: tuple[int, ...], cost: float, lo: float,
) -> Node:
    """Record an offer of ``seg`` (reachable from ``lo``; at ``pos`` for ``cost``).

    A new state, or the existing ``node`` with the lowest ``low`` and, when the offer is
    cheaper, the offer's position, parent, via and cost. Returns the state.
    """
    if node is None:
        node = Node(seg, ctx.seq, ctx.t, pos, mx, my, parent, via, cost, lo)
        new[seg] = node
        return node
    if lo < node.low:
        node.low = lo
    if cost < node.cost:
        node.pos = pos
        node.x = mx
        node.y = my
        node.parent = parent
        node.via = via
        node.cost = cost
    return node


def _cross_term(
    view: NetworkView, ctx: StepContext, parent: Node, ex: float, ey: float,
    dx: float, dy: float, length2: float,
) -> float:
    """The distance term of ``settings.bridge_error_cross``: correlated across the road only.

    The offset e1 = (ex, ey) of the matched point from the new fix splits into its part
    across the new segment (c1, along the segment's left normal) and along it (a1,
    non-zero only where the matched point is clamped to an end or to the reachable part).
    The parent's offset at p0 counts only by its part across the parent's own segment
    (c0 n0): that is the GNSS lean a road alongside would exploit, while where along
    the road, or where on a junction, the parent's matched point sat is the path's own
    choice, not the error's. Projected on the new segment's normal that vector is
    k c0 with k = t0 . t1 (rotating both unit tangents by 90 degrees keeps their dot
    product; a twin parent has k = -1, its left side being the new segment's right).
    The parent's part along its own segment is treated as unobserved, of variance
    sigma^2, so under first-order Gauss-Markov error with correlation rho the part
    across the new segment given c0 is normal with mean rho k c0 and variance
    sigma^2 (1 - rho^2 k^2). The term is (a1^2 + (c1 - rho k c0)^2 / (1 - rho^2 k^2))
    / (2 sigma^2): the full conditional between parallel segments, the independent
    term between perpendicular ones, and the independent term along the road. A
    segment of no length keeps the independent term.
    """
    rho = ctx.error_rho
    a0 = view.sf[parent.seg]
    b0 = view.st[parent.seg]
    px = view.vx[b0] - view.vx[a0]
    py = view.vy[b0] - view.vy[a0]
    l0 = math.sqrt(px * px + py * py)
    if length2 <= 0.0 or l0 <= 0.0:
        return (ex * ex + ey * ey) * ctx.inv_two_sigma2
    l1 = math.sqrt(length2)
    t1x = dx / l1
    t1y = dy / l1
    t0x = px / l0
    t0y = py / l0
    c1 = ey * t1x - ex * t1y
    a1 = ex * t1x + ey * t1y
    c0 = (parent.y - ctx.y0) * t0x - (parent.x - ctx.x0) * t0y
    k = t0x * t1x + t0y * t1y
    w = c1 - rho * k * c0
    return (a1 * a1 + w * w / (1.0 - rho * rho * k * k)) * ctx.inv_two_sigma2


def _roll_floor(view: NetworkView, ctx: StepContext, node: Node) -> float:
    """``_offer``'s ``floor`` for ``node`` going on along its own segment (``ctx.roll_back``).

    ``node.pos`` less ``ctx.roll_back`` metres (as a parameter of the segment; the
    position itself on a segment of no length); -1 (no floor) with the rule off.
    """
    if ctx.roll_back < 0.0:
        return -1.0
    length = view.slen[node.seg]
    return node.pos - ctx.roll_back / length if length > 0.0 else node.pos


def sweep_step(live: dict[int, Node], ctx: StepContext) -> dict[int, Node]:
    """Advance the states ``live`` (at fix p0) by the trace segment p0 -> p1.

    Returns the states at p1; empty when the window is no longer within eps (the
    decision at this level has died).

    With ``ctx.roll_back`` >= 0 (``MatchSettings.no_roll_back``) a state offered along
    its own segment is reported no more than that many metres behind the state it comes
    from (``_offer``'s ``floor``; the reachable part and ``low`` are unchanged, so the
    decision is the same): a lineage that never turns round can no longer answer a
    drive back along the twin on the way in, a twin's geometry being the same line.
    """
    view = ctx.view
    vx, vy, sf, st, out, twin, ok = (
        view.vx, view.vy, view.sf, view.st, view.out, view.twin, view.turn_back_ok)
    eps2 = ctx.eps * ctx.eps
    x0, y0, x1, y1 = ctx.x0, ctx.y0, ctx.x1, ctx.y1
    new: dict[int, Node] = {}
    heap: list[tuple[float, float, int, int, Node, tuple[int, ...]]] = []
    white: dict[int, tuple[float, float]] = {}
    counter = 0
    for seg, node in live.items():
        a = sf[seg]
        b = st[seg]
        lo, hi = free_interval(vx[a], vy[a], vx[b], vy[b], x1, y1, eps2)
        low = node.low if node.low > lo else lo
        if low <= hi:
            _offer(new, ctx, seg, low, hi, node, (), _roll_floor(view, ctx, node))
        w = white.get(b)
        if w is None:
            w = free_interval(x0, y0, x1, y1, vx[b], vy[b], eps2)
            white[b] = w
        if w[0] <= w[1]:
            counter += 1
            heap.append((w[0], node.cost, counter, b, node, ()))
    heapq.heapify(heap)
    done: set[int] = set()
    while heap:
        s, _, _, v, parent, via = heapq.heappop(heap)
        if v in done:
            continue
        done.add(v)
        back = twin[via[-1] if via else parent.seg]
        for f in out[v]:
            if f == back and not ok[v]:
                continue
            w_vertex = st[f]
            lo, hi = free_interval(vx[v], vy[v], vx[w_vertex], vy[w_vertex], x1, y1, eps2)
            if lo <= hi:
                _offer(new, ctx, f, lo, hi, parent, via)
            if w_vertex in done:
                continue
            w = white.get(w_vertex)
            if w is None:
                w = free_interval(x0, y0, x1, y1, vx[w_vertex], vy[w_vertex], eps2)
                white[w_vertex] = w
            sw = s if s > w[0] else w[0]
            if sw <= w[1]:
                counter += 1
                heapq.heappush(heap, (sw, parent.cost, counter, w_vertex, parent, (*via, f)))
    return new


def fresh_start(network: RoadNetwork, ctx: StepContext) -> dict[int, Node]:
    """Root states: every segment within eps of the fix p1 (the spatial index's job)."""
    view = ctx.view
    eps2 = ctx.eps * ctx.eps
    new: dict[int, Node] = {}
    for seg in network.segments_near(ctx.x1, ctx.y1, ctx.eps).tolist():
        a = view.sf[seg]
        b = view.st[seg]
        lo, hi = free_interval(view.vx[a], view.vy[a], view.vx[b], view.vy[b],
                               ctx.x1, ctx.y1, eps2)
        if lo <= hi:
            _offer(new, ctx, seg, lo, hi, None, ())
    return new


def step_route(view: NetworkView, node: Node) -> float:
    """Route length (metres) of the step that reached ``node`` from its parent; -1 at a root.

    The same length the route term of the cost uses: signed when the step stayed on one
    segment (a lag within eps can report a small roll back).

    Example (one 100 m road; a root, then a state 25 m further on):
        >>> from livematch.core.build import Road, network_from_roads
        >>> from livematch.core.view import view_of
        >>> view = view_of(network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)]))
        >>> root = Node(0, 1, 0.0, 0.25, 25.0, 0.0, None, (), 0.0, 0.0)
        >>> step_route(view, root)
        -1.0
        >>> step_route(view, Node(0, 2, 5.0, 0.5, 50.0, 0.0, root, (), 0.0, 0.0))
        25.0
    """
    parent = node.parent
    if parent is None:
        return -1.0
    slen = view.slen
    if not node.via and node.seg == parent.seg:
        return (node.pos - parent.pos) * slen[node.seg]
    # sum() over map: the same builtin summing the same floats in the same order as over
    # a generator (so the same float64), without a generator frame per segment
    return ((1.0 - parent.pos) * slen[parent.seg] + sum(map(slen.__getitem__, node.via))
            + node.pos * slen[node.seg])


def pace(view: NetworkView, node: Node, t: float) -> float:
    """Metres a candidate would drive from ``node`` until time ``t`` at its last speed.

    The speed is the route length of the step that reached ``node`` over that step's
    duration (a roll back counts as standing still). Returns -1 when there is no such
    step (a root, or a tree cut by a commit) or the times do not increase.

    Example (25 m in 5 s, so 50 m in the next 10 s; a root has no pace):
        >>> from livematch.core.build import Road, network_from_roads
        >>> from livematch.core.view import view_of
        >>> view = view_of(network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)]))
        >>> root = Node(0, 1, 0.0, 0.25, 25.0, 0.0, None, (), 0.0, 0.0)
        >>> pace(view, Node(0, 2, 5.0, 0.5, 50.0, 0.0, root, (), 0.0, 0.0), 15.0)
        50.0
        >>> pace(view, root, 15.0)
        -1.0
    """
    parent = node.parent
    if parent is None or node.t <= parent.t or t <= node.t:
        return -1.0
    route = step_route(view, node)
    return (route if route > 0.0 else 0.0) * (t - node.t) / (node.t - parent.t)


# on the simulated drives more than 8 changed nothing (bench/accuracy.py)
BRIDGE_OWN_SEARCHES: Final = 8


def bridge_step(
    network: RoadNetwork, live: dict[int, Node], ctx: StepContext, limit: float,
    search: RouteSearch = route_searches, paces: list[float] | None = None,
    shared: SharedSearches | None = None,
) -> dict[int, Node]:
    """Reach the segments within eps of p1 from ``live`` by routes of at most ``limit`` m.

    Used where the straight chord p0 -> p1 is a poor model of the road path: a long
    gap between fixes, or a step at which this level's window died. The tree of candidate
    paths continues through the route; the Fréchet certificate restarts at p1. One
    multi-source Dijkstra labels every vertex with the live state minimising its path
    cost (in metres, times beta) plus route length: where the route is at least as long
    as the straight step, as it nearly always is, that is the cheapest parent under the
    route-length term of the cost. The other terms (the motion term above all) differ
    per parent, so the ``BRIDGE_OWN_SEARCHES`` cheapest states also get a search of their
    own and every target is offered to each of them: at 15-30 s between fixes that is
    where most of the accuracy comes from. Every offer here also pays the pace term
    (:func:`pace`, ``ctx.pace_cost``): on the simulated drives of bench/accuracy.py it
    is what gets a vehicle out of a dead end it drove into and back out of between two
    fixes 15-30 s apart. ``search`` runs the searches: the compiled
    :func:`~livematch.core.routing.route_searches` or its pure-Python reference.
    ``paces``: :func:`pace` of each live state at ``ctx.t``, in ``live``'s order, when
    the caller has them already (:func:`advance`, from :func:`bridge_reach`).
    ``shared``: the own searches other levels made for the same fix
    (:class:`SharedSearches`); an own search one of them answers is not run again.
    """
    view = ctx.view
    eps2 = ctx.eps * ctx.eps
    targets = network.segments_near(ctx.x1, ctx.y1, ctx.eps).tolist()
    if not targets or not live:
        return {}
    nodes = list(live.values())
    beta = 1.0 / ctx.inv_beta if ctx.inv_beta > 0.0 else 0.0
    base = min(n.cost for n in nodes)
    offsets = [(n.cost - base) * beta for n in nodes]
    sources = [
        (view.st[n.seg], (1.0 - n.pos) * view.slen[n.seg], i, n.seg) for i, n in enumerate(nodes)
    ]
    if ctx.turn_near and not ctx.street_turns:
        # a source entered by no segment may leave its vertex by any, the way back included
        # (the turn is charged in _offer as every U-turn is, with street_turn_cost where
        # the network has none): only at vertices within eps of p0
        vx, vy = view.vx, view.vy
        sources = [(v, length, i, -1 if (vx[v] - ctx.x0) ** 2 + (vy[v] - ctx.y0) ** 2 <= eps2
                    else seg) for v, length, i, seg in sources]
    searches = [(sources, offsets)]
    # The multi-source search keeps one parent per vertex; the cheapest few states also
    # get a search of their own, so a target's parent is chosen on the full cost.
    ranked = sorted(range(len(nodes)), key=lambda i: (nodes[i].cost, nodes[i].seg))
    own = [0.0] * len(nodes)
    for i in ranked[:BRIDGE_OWN_SEARCHES] if len(nodes) > 1 else ():
        searches.append(([sources[i]], own))
    # one call for every search, answering for the targets only (each entered by a route
    # that may turn into it: U-turns only where the network allows them)
    # hits: the own searches another level's search answers (index in ``searches``, source
    # tag, that search), in order; the table answers the others, in order
    hits: list[tuple[int, int, SharedSearch]] = []
    if search is not route_searches:
        table = RouteTable.of_arrivals(
            search(view, searches, limit, targets, ctx.street_turns), len(targets))
    elif shared is None:
        table = route_table(view, searches, limit, targets, ctx.street_turns)
    else:
        table, hits = shared.run(view, searches, limit, targets, ctx.street_turns)
    paced = ctx.pace_cost > 0.0 and not ctx.pace_free
    if paced and ctx.speed_route >= 0.0:
        # the fixes' own speed over ground (settings.speed_pace_m): one least route
        # for every candidate, whatever speed its own path implies
        paces = [ctx.speed_route] * len(nodes)
    elif paced:
        if paces is None:
            paces = [pace(view, n, ctx.t) for n in nodes]
    else:
        paces = [-1.0] * len(nodes)
    expects = paces
    new: dict[int, Node] = {}
    sf, st, vx, vy, slen = view.sf, view.st, view.vx, view.vy, view.slen
    x1, y1 = ctx.x1, ctx.y1
    # each target's free interval at p1 and the length of its part before it, or None
    frees: list[tuple[float, float, float] | None] = []
    for seg in targets:
        a = sf[seg]
        b = st[seg]
        lo, hi = free_interval(vx[a], vy[a], vx[b], vy[b], x1, y1, eps2)
        frees.append((lo, hi, lo * slen[seg]) if lo <= hi else None)
    # The arrivals each target is offered, in the order of the searches: (parent, route,
    # expected route, route length to the target's tail as the search added it, its
    # offset taken off). Read off the table in one pass; an arrival whose route is too
    # long for the target's free interval is dropped before its route is sliced out.
    n_t = len(targets)
    kept: list[list[tuple[Node, tuple[int, ...], float, float]]] = [[] for _ in targets]
    vias = table.vias
    it = iter(table.info)  # four ints per arrival: row, source, via_start, via_len
    if not hits:
        for d, row, source, start, n in zip(table.dist, it, it, it, it, strict=False):
            if row < n_t:
                k = row
                d -= offsets[source]  # the multi-source search's (the own searches': 0.0)
            else:
                k = row % n_t
            f = frees[k]
            if f is None or d + f[2] > limit:
                continue
            kept[k].append((nodes[source], vias[start:start + n], expects[source], d))
    else:
        # the table answers the searches not in ``hits``, in order: the searches the hits
        # stand for are read in between, at their place in the order of the searches
        h = 0
        at = {seg: k for k, seg in enumerate(targets)}
        for d, row, source, start, n in zip(table.dist, it, it, it, it, strict=False):
            j = row // n_t
            while h < len(hits) and hits[h][0] <= j + h:
                _shared_offers(kept, hits[h], at, frees, nodes, expects, limit)
                h += 1
            if row < n_t:
                k = row
                d -= offsets[source]
            else:
                k = row - j * n_t
            f = frees[k]
            if f is None or d + f[2] > limit:
                continue
            kept[k].append((nodes[source], vias[start:start + n], expects[source], d))
        for hit in hits[h:]:
            _shared_offers(kept, hit, at, frees, nodes, expects, limit)
    index = {seg: i for i, seg in enumerate(live)}
    # how far a route length the search added up (offset included, then taken off) may
    # be from _offer's own sum of the same segments: rounding only, far below this
    slack = 1e-6 + 1e-9 * (abs(limit) + max(abs(o) for o in offsets))
    # The offers from the searches are _offer's, inlined (see _bridge_offers) unless the
    # error terms need the parent (ctx.error_rho > 0): a bridged step makes a hundred or
    # more of them, most of which change nothing.
    inline = not ctx.error_rho > 0.0
    for k, seg in enumerate(targets):
        f = frees[k]
        if f is None:
            continue
        lo, hi, _ = f
        same = live.get(seg)
        if same is not None and hi >= same.pos:
            _offer(new, ctx, seg, max(lo, same.pos), hi, same, (), same.pos,
                   expects[index[seg]])
        offers = kept[k]
        if not offers:
            continue
        if inline:
            _bridge_offers(new, ctx, seg, lo, hi, offers, slack)
        else:
            for parent, via, expect, _ in offers:
                _offer(new, ctx, seg, lo, hi, parent, via, -1.0, expect)
    return new


class SharedSearches:
    """The own searches of one fix's bridged steps, kept for the other levels to reuse.

    At 15-30 s between fixes every eps level bridges every step, and most of the states
    that get an own search (:data:`BRIDGE_OWN_SEARCHES`) are live at more than one level:
    the same segment at the same position, so the same source (on the Helsinki drives of
    ``bench/sparseprofile.py`` six in ten own searches repeated one of an earlier level
    at the same fix). A search from one source with no offset settles segments in the
    order of their keys (route length, segment, segment before; its one tag decides
    nothing), and a search bounded at ``limit`` pushes only entries whose length is at
    most ``limit``: so its pops are those of a search bounded at a larger limit, up to
    the first entry longer than ``limit``, and it enters a segment exactly when the
    larger one entered it by a route no longer than ``limit``, by the same route. A
    search that answered for a superset of the targets, bounded at least as far, from
    the same source on the same turn rule, therefore answers this one: the same
    arrivals, bit for bit. The tracker bridges the levels from the largest eps down
    (largest targets and reach first), one :class:`SharedSearches` per fix.

    Attributes:
        found: per source ``(vertex, initial length, entering segment, anywhere)``, the
            search that answers for it (:class:`SharedSearch`).
        keep: record the own searches run (off for the last level of a fix).
    """

    __slots__ = ("found", "keep")

    def __init__(self) -> None:
        self.found: dict[tuple[int, float, int, bool], SharedSearch] = {}
        self.keep = True

    def run(self, view: NetworkView, searches: Sequence[Search], limit: float,
            targets: list[int], anywhere: bool = False,
            ) -> tuple[RouteTable, list[tuple[int, int, SharedSearch]]]:
        """:func:`route_table` of the searches no earlier search answers, and the others.

        ``searches``: :func:`bridge_step`'s, the multi-source search first, then the own
        searches (one source each, no offset). Returns the table of the searches run, in
        order, and for each own search answered from before: its index in ``searches``,
        its source's tag, and the search that answers it.
        """
        hits: list[tuple[int, int, SharedSearch]] = []
        run: list[Search] = [searches[0]]
        keys: list[tuple[int, float, int, bool]] = []
        wanted = frozenset(targets)
        found = self.found
        for j in range(1, len(searches)):
            (vertex, length, tag, seg), = searches[j][0]
            key = (vertex, length, seg, anywhere)
            got = found.get(key)
            if got is not None and got.limit >= limit and wanted <= got.wanted:
                hits.append((j, tag, got))
            else:
                run.append(searches[j])
                keys.append(key)
        table = route_table(view, run, limit, targets, anywhere)
        if self.keep:
            for j, key in enumerate(keys, start=1):
                old = found.get(key)
                if old is None or (limit >= old.limit and wanted >= old.wanted):
                    found[key] = SharedSearch(limit, wanted, table, targets, j)
        return table, hits


class SharedSearch(NamedTuple):
    """One own search kept by :class:`SharedSearches`: search ``search`` of ``table``.

    Attributes:
        limit: its bound (metres).
        wanted: the targets it answered for (``targets``, as a set).
        table: the answer of the call it ran in (:func:`route_table`).
        targets: that call's end segments.
        search: its index among that call's searches.
    """

    limit: float
    wanted: frozenset[int]
    table: RouteTable
    targets: list[int]
    search: int

    def entries(self) -> range:
        """The indices of its arrivals in the table (a search's are consecutive)."""
        rows = self.table.info[::INFO_STRIDE]
        n_t = len(self.targets)
        return range(bisect_left(rows, self.search * n_t),
                     bisect_left(rows, (self.search + 1) * n_t))

    def arrivals(self) -> dict[int, tuple[float, tuple[int, ...]]]:
        """Each target it entered: the route length to the target's tail and the route.

        Example (a 100 m road both ways; from its tail, its way back is entered at
        100 m, after the U-turn at the dead end):
            >>> from livematch.core.build import Road, network_from_roads
            >>> from livematch.core.view import view_of
            >>> view = view_of(network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)]))
            >>> source = ([(0, 0.0, 0, -1)], [0.0])
            >>> table = route_table(view, [source, source], 150.0, [0, 1])
            >>> SharedSearch(150.0, frozenset([0, 1]), table, [0, 1], 1).arrivals()
            {0: (0.0, ()), 1: (100.0, (0,))}
        """
        info = self.table.info
        base = self.search * len(self.targets)
        return {self.targets[info[INFO_STRIDE * e] - base]:
                (self.table.dist[e], self.table.vias[info[INFO_STRIDE * e + 2]:
                                                     info[INFO_STRIDE * e + 2]
                                                     + info[INFO_STRIDE * e + 3]])
                for e in self.entries()}


def _shared_offers(
    kept: list[list[tuple[Node, tuple[int, ...], float, float]]],
    hit: tuple[int, int, SharedSearch], index: dict[int, int],
    frees: list[tuple[float, float, float] | None], nodes: list[Node], expects: list[float],
    limit: float,
) -> None:
    """Add an own search answered by :class:`SharedSearches` to each target's offers.

    As :func:`bridge_step` reads an arrival of its own table: a target (``index``: its
    position among this step's targets) is entered by a search bounded at ``limit`` when
    the route length to its tail is at most ``limit`` (no offset: the length is the label
    itself), and offered when that length plus the target's part before its free
    interval is within ``limit`` too. Routes are sliced out for the offers only.
    """
    _, i, shared = hit
    parent = nodes[i]
    expect = expects[i]
    table = shared.table
    dist, info, vias = table.dist, table.info, table.vias
    targets = shared.targets
    base = shared.search * len(targets)
    for e in shared.entries():
        q = INFO_STRIDE * e
        k = index.get(targets[info[q] - base])
        if k is None:
            continue  # not a target of this step
        d = dist[e]
        if not d <= limit:
            continue  # a search bounded at limit does not enter it
        f = frees[k]
        if f is None or d + f[2] > limit:
            continue
        start = info[q + 2]
        kept[k].append((parent, vias[start:start + info[q + 3]], expect, d))


def _bridge_offers(
    new: dict[int, Node], ctx: StepContext, seg: int, lo: float, hi: float,
    offers: list[tuple[Node, tuple[int, ...], float, float]], slack: float,
) -> None:
    """:func:`_offer` of ``seg`` on [lo, hi] from each ``(parent, via, expect)``, in order.

    The same arithmetic in the same order (the same float64 comes out), for the offers of
    :func:`bridge_step` from its searches: no floor and no error correlation
    (``ctx.error_rho`` is 0), so the matched point and its distance term are the same for
    every parent and are computed once. Two kinds of offer that :func:`_offer` would
    compute in full only to change nothing are cut short: one whose parent's cost plus
    that distance term already reaches the segment's best cost (every other term is
    >= 0 when the weights are, and float addition is monotone), and a repeat of an offer
    made before (the multi-source search and a source's own search often find the same
    route). Most offers are neither, and would walk their whole route (16 segments on
    average at 15-30 s between fixes) only to lose: the search's own length of the route
    (each offer's last item, the route up to ``seg``'s tail, within ``slack`` metres of
    _offer's sum) gives a lower bound of the cost, and an offer whose bound is above the
    segment's best cost by more than rounding could explain changes nothing either.
    """
    view = ctx.view
    slen = view.slen
    ax, ay, dx, dy = _frame(view, seg)
    x1 = ctx.x1
    y1 = ctx.y1
    length2 = dx * dx + dy * dy
    pos = ((x1 - ax) * dx + (y1 - ay) * dy) / length2 if length2 > 0.0 else lo
    bottom = lo if lo > -1.0 else (-1.0 if hi > -1.0 else hi)
    pos = bottom if pos < bottom else (hi if pos > hi else pos)
    mx = ax + pos * dx
    my = ay + pos * dy
    ex = mx - x1
    ey = my - y1
    dist = (ex * ex + ey * ey) * ctx.inv_two_sigma2
    tail = pos * slen[seg]
    turn_back_cost = ctx.turn_back_cost
    street_turn_cost = ctx.street_turn_cost
    chord = ctx.chord
    inv_beta = ctx.inv_beta
    pace_cost = ctx.pace_cost
    speed_route = ctx.speed_route
    motion_cost = ctx.motion_cost
    sx = x1 - ctx.x0
    sy = y1 - ctx.y0
    bound = (dist >= 0.0 and turn_back_cost >= 0.0 and street_turn_cost >= 0.0
             and inv_beta >= 0.0 and pace_cost >= 0.0 and motion_cost >= 0.0)
    done: set[tuple[int, tuple[int, ...], float]] = set()
    node = new.get(seg)
    for parent, via, expect, before in offers:
        motion = -1.0  # the motion term, once computed (it is >= 0)
        if node is not None:
            if lo >= node.low and parent.cost >= node.cost:
                continue  # every term of the cost is >= 0: this way cannot do better
            if bound and (via or seg != parent.seg):
                least = dist + parent.cost
                if least < node.cost:
                    # the route and pace terms at the route length the search found,
                    # less the slack, and the motion term: all >= 0
                    route = before + tail
                    gap = abs(route - chord) - slack
                    if gap > 0.0:
                        least += gap * inv_beta
                    gap = (expect - route - slack if speed_route >= 0.0
                           else abs(route - expect) - slack if expect >= 0.0 else 0.0)
                    if gap > 0.0:
                        least += gap * pace_cost
                    if motion_cost > 0.0 and least - 1e-9 * least - 1e-9 < node.cost:
                        ux = (mx - parent.x) - sx
                        uy = (my - parent.y) - sy
                        motion = math.sqrt(ux * ux + uy * uy) * motion_cost
                        least += motion
                    least -= 1e-9 * least + 1e-9  # float rounding of the cost's own sum
                if least >= node.cost:
                    if lo < node.low:
                        node.low = lo
                    continue
        key = (id(parent), via, expect)
        if key in done:
            continue  # the same offer again: it cannot change the state it made
        done.add(key)
        cost = dist
        if not via and seg == parent.seg:
            route = (pos - parent.pos) * slen[seg]
        else:
            route, turns, street = _route_turns(
                view, parent, via, seg, (1.0 - parent.pos) * slen[parent.seg] + tail)
            cost += turns * turn_back_cost + street * street_turn_cost
        cost += parent.cost + abs(route - chord) * inv_beta
        if speed_route >= 0.0:
            if route < expect:
                cost += (expect - route) * pace_cost
        elif expect >= 0.0:
            cost += abs(route - expect) * pace_cost
        if motion_cost > 0.0:
            if not motion >= 0.0:
                ux = (mx - parent.x) - sx
                uy = (my - parent.y) - sy
                motion = math.sqrt(ux * ux + uy * uy) * motion_cost
            cost += motion
        node = _keep(new, node, ctx, seg, pos, mx, my, parent, via, cost, lo)


def bridge_reach(live: dict[int, Node], ctx: StepContext, settings: MatchSettings,
                 paces: list[float] | None = None) -> float:
    """The detour bound of a bridged step (metres): the longest route it searches.

    Before the speed bound and the eps slack (:func:`advance`): ``detour_factor`` times
    the straight step plus ``gap_m`` (common practice: a route much longer than the line
    between two fixes is implausible), raised with ``settings.pace_reach`` to the
    longest route a live candidate's own pace predicts (:func:`pace`). Why: the pace
    term charges a route for differing from that length, so a route that long is by
    this cost's own account the expected one, and the detour bound must not rule it out
    before the cost sees it. At 30 s between fixes a vehicle that drives into a dead end
    and back out, or round a block, covers 300-800 m while its two fixes lie 50-150 m
    apart: the common-practice bound cut the driven route at 1.6 % (Helsinki) and 1.3 %
    (test) of the steps of bench/accuracy.py's random-walk drives (seed 31), and the
    bridge then had only wrong roads to offer. At 1-15 s a pace longer than the bound is
    rare (more than 150 m in one step, with fixes close together); the speed bound
    (``bridge_speed_mps``) still caps every route. ``paces``: :func:`pace` of each live
    state at ``ctx.t`` in ``live``'s order, when the caller has them.

    Example (a candidate that drove 100 m in the 10 s before: 300 m in the next 30 s;
    a 50 m straight step bounds routes at 2 x 50 + 150 = 250 m without ``pace_reach``):
        >>> from livematch.core.build import Road, network_from_roads
        >>> from livematch.core.view import view_of
        >>> view = view_of(network_from_roads([Road([(0.0, 0.0), (1000.0, 0.0)], way=1)]))
        >>> root = Node(0, 1, 0.0, 0.0, 0.0, 0.0, None, (), 0.0, 0.0)
        >>> live = {0: Node(0, 2, 10.0, 0.1, 100.0, 0.0, root, (), 0.0, 0.0)}
        >>> ctx = StepContext.between(view, MatchSettings(), 15.0, 100.0, 0.0, 150.0, 0.0,
        ...                           3, 40.0)
        >>> bridge_reach(live, ctx, MatchSettings()), bridge_reach(live, ctx,
        ...     MatchSettings(pace_reach=False))
        (300.0, 250.0)
        >>> bridge_reach({0: root}, ctx, MatchSettings())  # a root has no pace
        250.0
    """
    detour = settings.detour_factor * ctx.chord + settings.gap_m
    if ctx.speed_route > detour:  # settings.speed_pace_m: the route the speed predicts
        detour = ctx.speed_route
    if settings.pace_reach and ctx.pace_cost > 0.0:
        for expect in (paces if paces is not None
                       else [pace(ctx.view, node, ctx.t) for node in live.values()]):
            if expect > detour:
                detour = expect
    return detour


def advance(
    network: RoadNetwork, live: dict[int, Node], ctx: StepContext, settings: MatchSettings,
    dt: float, *, gap: bool = False,
    step: Callable[[dict[int, Node], StepContext], dict[int, Node]] = sweep_step,
    shared: SharedSearches | None = None,
) -> tuple[dict[int, Node], str]:
    """One level, one fix: sweep, else bridge, else start afresh.

    Args:
        network, live, ctx: the level's states at the previous fix and the step.
        settings: bridging bounds (``bridge_speed_mps``, and :func:`bridge_reach`).
        dt: seconds since the previous fix.
        gap: the step is a gap: skip the sweep, bridge at once.
        step: the sweep implementation (the compiled one in the tracker).
        shared: the own searches of the fix's other bridged levels
            (:class:`SharedSearches`; :func:`bridge_step`).

    Returns:
        The new states and how they were reached: ``"swept"`` (the Fréchet window goes
        on), ``"bridged"`` (the candidate tree goes on, the window restarts) or
        ``"fresh"`` (a new tree from the spatial index; empty when no road is near).
    """
    if live and not gap:
        new = step(live, ctx)
        if new:
            return new, "swept"
    if live:
        # each live state's pace, for the reach and the bridge's pace term alike
        paces = ([pace(ctx.view, n, ctx.t) for n in live.values()] if ctx.pace_cost > 0.0
                 else None)
        limit = min(settings.bridge_speed_mps * dt, bridge_reach(live, ctx, settings, paces)) \
            + 2.0 * ctx.eps
        if ((settings.bridge_error_corr or settings.bridge_error_cross)
                and settings.error_tau_s > 0.0 and dt > settings.gap_s):
            ctx = replace(ctx, error_rho=math.exp(-dt / settings.error_tau_s),
                          error_cross=settings.bridge_error_cross)
        new = bridge_step(network, live, ctx, limit, paces=paces, shared=shared)
        if new:
            return new, "bridged"
    return fresh_start(network, ctx), "fresh"


def best_leaf(live: dict[int, Node], prefer: int = -1) -> Node:
    """The live state with the lowest cost, deterministic.

    Exact ties (a vehicle standing on a junction is equally close to every branch) go to
    segment ``prefer`` (the one reported last), then to the lowest segment index.
    """
    return min(live.values(), key=lambda n: (n.cost, n.seg != prefer, n.seg))


def beam(live: dict[int, Node], margin: float, most: int, prefer: int = -1,
         guard: Collection[int] = ()) -> dict[int, Node]:
    """The live states near the best: a cost beam over one level's candidates.

    A state stays when its cost is at most the best's (:func:`best_leaf`) plus
    ``margin`` (``margin`` <= 0: no bound) and, with ``most`` > 0, it is among the
    ``most`` first by :func:`best_leaf`'s order (cost, then segment ``prefer``, then the
    lowest segment). The best state always stays, and so does every state whose segment
    is in ``guard`` (a smaller level's live segments, ``MatchSettings.beam_guard``: the
    fallback keeps the roads the level that decides still holds); the order of ``live``
    is kept.
    Dropping states leaves every kept path as it was (each still within eps of its
    fixes): the level can only die, and start afresh, sooner. Why: a large level
    (the fallback while a smaller one decides) holds many states far from the fixes,
    each a live row and its ancestors in memory (``MatchSettings.beam_margin``,
    ``MatchSettings.beam_keep``).

    Example (three states on segments 0, 1, 2 costing 1, 4 and 9):
        >>> live = {s: Node(s, 1, 0.0, 0.5, 0.0, 0.0, None, (), c, 0.0)
        ...         for s, c in ((0, 1.0), (1, 4.0), (2, 9.0))}
        >>> list(beam(live, 5.0, 0))  # within 5 of the best
        [0, 1]
        >>> list(beam(live, 0.0, 1))  # the best one only
        [0]
        >>> list(beam(live, 0.0, 0))  # no bound: every state
        [0, 1, 2]
        >>> list(beam(live, 0.0, 1, guard={2}))  # the best, and the guarded segment 2
        [0, 2]
        >>> list(beam({}, 0.0, 1))  # degenerate: no state
        []
    """
    if not live:
        return {}
    order = sorted(live.values(), key=lambda n: (n.cost, n.seg != prefer, n.seg))
    bound = order[0].cost + margin if margin > 0.0 else math.inf
    kept = [n for n in order if n.cost <= bound]
    if most > 0:
        kept = kept[:most]
    ids = {id(n) for n in kept}
    return {s: n for s, n in live.items() if id(n) in ids or n.seg in guard}


def live_score(
    node: Node, fixes: Mapping[int, tuple[float, float]], first: int,
    inv_two_sigma2: float, tau_s: float, max_dt: float,
) -> float:
    """The score that ranks live candidates for the live answer (lower is better).

    The path cost charges every fix its squared distance to the matched point as if the
    GNSS errors of successive fixes were independent. They are not: consumer GNSS error
    wanders over tens of seconds (Ranacher et al., IJGIS 2016, on temporally correlated
    GNSS error). Where the error leans 8-10 m towards a side road for half a minute (a
    vehicle waiting at a junction, a road parallel to the one driven), a candidate that
    turned onto that road collects a smaller distance term on every fix, and stays the
    best leaf until the two roads part and the wrong branch dies: right in the final
    answer, wrong in the live one for all that time.

    The live score models the error e_k = (matched point - fix) at fix k as first-order
    Gauss-Markov (exponential autocorrelation with time constant ``tau_s``): with
    rho = exp(-dt / tau_s), the part of e_k not explained by e_{k-1} is
    w_k = e_k - rho e_{k-1}, of variance sigma^2 (1 - rho^2) per axis. So along the
    candidate's path, each link's distance term |e_k|^2 / (2 sigma^2) is replaced by
    |w_k|^2 / (2 sigma^2 (1 - rho^2)): an offset that stays (the true road, with the error
    leaning away from it) costs little after its first fix, and an offset that changes
    suddenly (a turn onto the road the error leans towards) costs much. Links are walked
    from ``node`` back to the oldest state at or after fix ``first`` (the tree holds
    nothing older that every candidate does not share). A link whose fixes are more than
    ``max_dt`` apart (a bridged gap) keeps its term: over such a gap the error has
    largely decorrelated, and the bridged route's own terms decide. The other terms of
    the path cost (route length, U-turns, motion, pace) are kept as they are.

    Args:
        node: a live candidate state.
        fixes: the fix positions (x, y) by sequence number; a missing fix leaves its
            links as they are.
        first: states older than this fix are not looked at.
        inv_two_sigma2: 1 / (2 sigma^2) of the path cost's distance term (1/m^2).
        tau_s: the error's time constant, seconds (> 0).
        max_dt: longest link (seconds) that is rescored.

    Example (two fixes 1 s apart; the candidate stays 6 m off both; tau 30 s):
        >>> a = Node(0, 1, 0.0, 0.1, 10.0, 6.0, None, (), 0.72, 0.0)
        >>> b = Node(0, 2, 1.0, 0.2, 20.0, 6.0, a, (), 1.44, 0.0)
        >>> fixes = {1: (10.0, 0.0), 2: (20.0, 0.0)}
        >>> round(live_score(b, fixes, 1, 0.02, 30.0, 10.0), 3)  # 1.44 - 0.72 + 0.012
        0.732
        >>> live_score(b, fixes, 2, 0.02, 30.0, 10.0)  # nothing older than fix 2: the cost
        1.44
    """
    score = node.cost
    inv_tau = 1.0 / tau_s
    cur = node
    while True:
        p = cur.parent
        if p is None or p.seq < first:
            break
        fc = fixes.get(cur.seq)
        fp = fixes.get(p.seq)
        dt = cur.t - p.t
        if fc is not None and fp is not None and 0.0 < dt <= max_dt:
            ex = cur.x - fc[0]
            ey = cur.y - fc[1]
            rho = math.exp(-dt * inv_tau)
            wx = ex - rho * (p.x - fp[0])
            wy = ey - rho * (p.y - fp[1])
            score += ((wx * wx + wy * wy) * inv_two_sigma2 / (1.0 - rho * rho)
                      - (ex * ex + ey * ey) * inv_two_sigma2)
        cur = p
    return score


def common_ancestor(leaves: Iterable[Node], floor: int = -1) -> Node | None:
    """The deepest state every leaf descends from (a leaf itself if only one), or None.

    Leaves must belong to one fix (every state's parent belongs to the fix before, so the
    walk moves all of them up one fix at a time). The walk gives up, returning None,
    below fix ``floor``: callers only care about ancestors from there on, and a tree
    whose branches never merge would otherwise be walked to its roots on every fix.
    """
    cur = list({id(n): n for n in leaves}.values())
    if not cur:
        return None
    while len(cur) > 1:
        if cur[0].seq <= floor:
            return None
        nxt: dict[int, Node] = {}
        for n in cur:
            p = n.parent
            if p is None:
                return None
            nxt[id(p)] = p
        cur = list(nxt.values())
    return cur[0]


def ancestor_at(node: Node, seq: int) -> Node:
    """The ancestor of ``node`` (itself included) with the largest ``seq`` <= ``seq``.

    Stops at the root if the tree does not reach that far back.
    """
    while node.seq > seq and node.parent is not None:
        node = node.parent
    return node


def descends_from(node: Node, ancestor: Node) -> bool:
    """Whether ``ancestor`` lies on the back-pointer chain of ``node``."""
    cur: Node | None = node
    while cur is not None and cur.seq >= ancestor.seq:
        if cur is ancestor:
            return True
        cur = cur.parent
    return False
