"""The commit-time stand rules' early return on short chains gives the full scans' answers.

``Tracker._close_stand_loops``, ``_turn_back_at_stand``, ``_way_out_of_stand`` and
``_stand_at_vertex`` return at once when the chain's fixes span less than ``STAND_S``
seconds: every stand they look for spans ``STAND_S`` and its nodes lie within the chain,
whose times increase. The full scans are kept as ``*_scan``. Here both run on the same
plain-data chains (random walks over a small junction with short side roads, a stub
and a ring, with fixes that stand near the junction or follow the nodes; and
constructed stands whose span is exactly ``STAND_S`` or a hair less) and must return
the same chain, node for node, and the same answers. The reference is the scan itself
(the rule as it was before the early return), run on a fresh copy of each chain.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.events import MatchedFix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node
from livematch.core.tracker import STAND_S, Tracker
from livematch.core.view import NetworkView, view_of

# V = (0, 0): a road in from the west, a road out east with a vertex B at (10, 0), a
# second way from V to B (a "diamond"), a 6 m dead-end stub and a small two-way ring
# through V. Every road is two-way.
ROADS = [
    Road([(-100.0, 0.0), (0.0, 0.0)], way=1),
    Road([(0.0, 0.0), (10.0, 0.0), (100.0, 0.0)], way=2),
    Road([(0.0, 0.0), (0.0, -6.0)], way=3),
    Road([(0.0, 0.0), (4.0, 5.0), (0.0, 9.0), (-4.0, 5.0), (0.0, 0.0)], way=4),
    Road([(0.0, 0.0), (5.0, -4.0), (10.0, 0.0)], way=5),
]
EPS = 15.0
T0 = 1000.0
#: The largest span below STAND_S at T0 (times are exact binary fractions here).
UNDER = STAND_S - 2.0 ** -20


@dataclass
class Case:
    """A chain as plain data: (seg, t, pos, via) per node after ``before``, and fixes."""

    before: tuple[int, float, float]  # seg, t, pos
    nodes: list[tuple[int, float, float, tuple[int, ...]]]
    fixes: list[tuple[float, float]]  # before's fix, then one per node


def _network() -> RoadNetwork:
    return network_from_roads(ROADS)


def _point(view: NetworkView, seg: int, pos: float) -> tuple[float, float]:
    a, b = view.sf[seg], view.st[seg]
    return (view.vx[a] + pos * (view.vx[b] - view.vx[a]),
            view.vy[a] + pos * (view.vy[b] - view.vy[a]))


def _tracker(net: RoadNetwork, settings: MatchSettings, case: Case) -> Tracker:
    """A tracker whose fix buffer holds ``case``'s fixes (the before node's is seq 1)."""
    tracker = Tracker(net, "v1", settings)
    tracker.fix_xy = np.array(case.fixes, dtype=np.float64)
    tracker.fix_seq0 = 1
    tracker.fix_n = len(case.fixes)
    return tracker


def _build(view: NetworkView, case: Case) -> tuple[list[Node], Node]:
    """Fresh linked nodes for ``case`` (the scans may relink the nodes they are given)."""
    seg, t, pos = case.before
    before = Node(seg, 1, t, pos, *_point(view, seg, pos), None, (), 0.0, pos)
    chain: list[Node] = []
    parent = before
    for k, (seg, t, pos, via) in enumerate(case.nodes):
        parent = Node(seg, k + 2, t, pos, *_point(view, seg, pos), parent, via,
                      float(k), pos)
        chain.append(parent)
    return chain, before


def _sig(chain: list[Node]) -> list[tuple[object, ...]]:
    return [(n.seg, n.seq, n.t, n.pos, n.x, n.y, n.via, n.cost, n.low,
             None if n.parent is None else (n.parent.seq, n.parent.seg)) for n in chain]


def _answers(chain: list[Node]) -> list[MatchedFix]:
    return [MatchedFix(n.t, n.seg, n.pos * 10.0, n.x, n.y) for n in chain]


def _compare(net: RoadNetwork, settings: MatchSettings, case: Case, goes_on: bool,
             starts: bool) -> dict[str, bool]:
    """Run each rule and its scan on fresh copies of ``case``; assert they agree.

    Returns, per rule, whether the scan changed anything.
    """
    view = view_of(net)
    changed: dict[str, bool] = {}
    for name in ("_close_stand_loops", "_turn_back_at_stand", "_way_out_of_stand"):
        fast_chain, fast_before = _build(view, case)
        scan_chain, scan_before = _build(view, case)
        plain = _sig(fast_chain)
        fast = getattr(_tracker(net, settings, case), name)(fast_chain, fast_before, EPS)
        scan = getattr(_tracker(net, settings, case), name + "_scan")(
            scan_chain, scan_before, EPS)
        assert _sig(fast) == _sig(scan), name
        changed[name] = _sig(scan) != plain
    fast_chain, fast_before = _build(view, case)
    scan_chain, scan_before = _build(view, case)
    fast_fixes = _answers(fast_chain)
    scan_fixes = _answers(scan_chain)
    plain_fixes = list(scan_fixes)
    _tracker(net, settings, case)._stand_at_vertex(fast_chain, fast_before, goes_on, starts,
                                                   EPS, fast_fixes)
    _tracker(net, settings, case)._stand_at_vertex_scan(scan_chain, scan_before, goes_on,
                                                        starts, EPS, scan_fixes)
    assert fast_fixes == scan_fixes
    changed["_stand_at_vertex"] = scan_fixes != plain_fixes
    return changed


def _random_case(rng: np.random.Generator, view: NetworkView) -> Case:
    """A random walk from a segment into V, fixes partly standing near V."""
    into_v = [s for s in range(len(view.sf)) if (view.vx[view.st[s]], view.vy[view.st[s]])
              == (0.0, 0.0)]
    seg = int(rng.choice(into_v))
    pos = float(rng.choice([0.5, 0.9, 1.0]))
    n = int(rng.integers(2, 20))
    gaps = rng.choice([0.5, 1.0, 1.0, 1.0, 1.0, 1.5, 2.0, 3.0, 6.0], size=n)
    times = T0 + np.cumsum(gaps)
    before = (seg, T0, pos)
    nodes: list[tuple[int, float, float, tuple[int, ...]]] = []
    cur = seg
    for k in range(n):
        if rng.random() < 0.55:
            pos = min(1.0, pos + float(rng.choice([0.0, 0.05, 0.2])))
            nodes.append((cur, float(times[k]), pos, ()))
            continue
        steps = []
        for _ in range(int(rng.integers(1, 4))):
            cur = int(rng.choice(view.out[view.st[cur]]))
            steps.append(cur)
        pos = float(rng.choice([0.0, 0.1, 0.3, 0.6, 1.0]))
        nodes.append((cur, float(times[k]), pos, tuple(steps[:-1])))
    # the fixes: a run standing near V (within a few metres, wandering), the others near
    # their node's point
    a = int(rng.integers(0, n + 1))
    b = int(rng.integers(a, n + 2))
    fixes = []
    for k in range(n + 1):  # before, then the nodes
        if a <= k < b:
            fixes.append((float(rng.normal(0.0, 1.5)), float(rng.normal(0.0, 1.5))))
        else:
            s, p = (before[0], before[2]) if k == 0 else (nodes[k - 1][0], nodes[k - 1][2])
            x, y = _point(view, s, p)
            fixes.append((x + float(rng.normal(0.0, 2.0)), y + float(rng.normal(0.0, 2.0))))
    return Case(before, nodes, fixes)


SETTINGS = [
    MatchSettings(),
    MatchSettings(stand_loops_outer=False, stand_short_m=10.0),
    MatchSettings(stand_loops_sparse=True),
]


@pytest.mark.parametrize("settings", SETTINGS)
def test_random_chains_give_the_scans_answers(settings: MatchSettings) -> None:
    """Random walks over the junction, 2-19 nodes 0.5-6 s apart (spans on both sides of
    STAND_S): every rule returns what its scan returns; the scans do change some of the
    chains that span STAND_S or more (the comparison is not of no-ops), and none that
    span less (what the early return relies on)."""
    net = _network()
    view = view_of(net)
    rng = np.random.default_rng(2126)
    long_changed: dict[str, int] = {}
    short = 0
    for _ in range(1500):
        case = _random_case(rng, view)
        span = case.nodes[-1][1] - case.nodes[0][1]
        changed = _compare(net, settings, case, bool(rng.random() < 0.5),
                           bool(rng.random() < 0.2))
        if span < STAND_S:
            short += 1
            if not settings.stand_loops_sparse:
                assert not any(changed.values())
        else:
            for name, did in changed.items():
                long_changed[name] = long_changed.get(name, 0) + did
    assert short >= 300
    for name in ("_close_stand_loops", "_turn_back_at_stand", "_way_out_of_stand",
                 "_stand_at_vertex"):
        assert long_changed.get(name, 0) > 0, (name, long_changed)


def _stand_case(span: float, lead: float = 0.0) -> Case:
    """Into V from the west, then 11 nodes 1 s apart standing on the road east of V.

    Every fix lies within 1 m of V and wanders (tenths of a metre from one to the next);
    the nodes' times run from ``T0 + lead`` to ``T0 + lead + span``.
    """
    net = _network()
    view = view_of(net)
    west = next(s for s in range(len(view.sf))
                if view.vx[view.sf[s]] == -100.0 and view.vx[view.st[s]] == 0.0)
    east = next(s for s in range(len(view.sf))
                if view.vx[view.sf[s]] == 0.0 and view.vy[view.sf[s]] == 0.0
                and view.vx[view.st[s]] == 10.0 and view.vy[view.st[s]] == 0.0)
    times = [T0 + lead + k for k in range(10)] + [T0 + lead + span]
    nodes = [(east, t, 0.05, ()) for t in times]
    fixes = [(-1.0, 0.3)] + [(0.3 * (k % 3), 0.2 * (k % 2)) for k in range(11)]
    return Case((west, T0 + lead - 1.0, 0.99), nodes, fixes)


@pytest.mark.parametrize("goes_on", [True, False])
def test_a_stand_exactly_stand_s_long_is_found(goes_on: bool) -> None:
    """A stand just past V whose run spans exactly STAND_S (with ``goes_on`` the whole
    chain; without, the chain from its second node, the first being on the road in): the
    scan reports the stand at V (the end of the road in), and so does the rule with its
    early return (the bound is "less than STAND_S", not "at most"); a hair shorter,
    neither moves anything."""
    net = _network()
    case = _stand_case(STAND_S)
    if not goes_on:
        # the stand's run then starts at the chain's second node (entered from the
        # first): put the first on the road in, so that the run spans exactly STAND_S
        # from the second node on
        first = (case.before[0], case.nodes[0][1] - 1.0, 0.995, ())
        case = Case((case.before[0], case.before[1] - 1.0, 0.99), [first, *case.nodes],
                    [case.fixes[0], *case.fixes])
    changed = _compare(net, MatchSettings(), case, goes_on, False)
    assert changed["_stand_at_vertex"]
    short = _stand_case(UNDER)
    assert short.nodes[-1][1] - short.nodes[0][1] < STAND_S
    assert not any(_compare(net, MatchSettings(), short, True, False).values())


def test_the_stand_is_read_at_vertex_v() -> None:
    """The answers the rule gives the exactly-STAND_S stand: every fix at V = (0, 0), on
    the road in from the west, at its end (100 m); checked against the geometry of the
    roads as drawn above, not against the tracker."""
    net = _network()
    view = view_of(net)
    case = _stand_case(STAND_S)
    chain, before = _build(view, case)
    fixes = _answers(chain)
    _tracker(net, MatchSettings(), case)._stand_at_vertex(chain, before, True, False, EPS,
                                                          fixes)
    west = case.before[0]
    assert [(f.segment, f.offset_m, f.x, f.y) for f in fixes] == [(west, 100.0, 0.0, 0.0)] * 11


def test_a_stub_loop_exactly_stand_s_long_is_closed() -> None:
    """Into V from the west, into the 6 m stub, U-turn at its end, back to V and on
    east: the nodes inside the loop span exactly STAND_S, their fixes stand at V. The
    rule (its early return not taken: the chain goes on past the loop) and its scan
    both cut the loop out; a hair shorter, neither does."""
    net = _network()
    view = view_of(net)

    def seg(a: tuple[float, float], b: tuple[float, float]) -> int:
        return next(s for s in range(len(view.sf))
                    if (view.vx[view.sf[s]], view.vy[view.sf[s]]) == a
                    and (view.vx[view.st[s]], view.vy[view.st[s]]) == b)

    west, stub_in = seg((-100.0, 0.0), (0.0, 0.0)), seg((0.0, 0.0), (0.0, -6.0))
    stub_out, east = seg((0.0, -6.0), (0.0, 0.0)), seg((0.0, 0.0), (10.0, 0.0))

    def case(span: float) -> Case:
        inside = [(stub_in, T0 + k, 0.3, ()) for k in range(6)]
        inside += [(stub_out, T0 + 6.0 + k, 0.6, ()) for k in range(4)]
        inside += [(stub_out, T0 + span, 0.7, ())]
        after = [(east, T0 + span + 1.0, 0.5, ())]
        fixes = [(-1.0, 0.0)] + [(0.2 * (k % 3), -0.3 * (k % 2)) for k in range(11)]
        return Case((west, T0 - 1.0, 0.99), inside + after, [*fixes, (5.0, 0.0)])

    changed = _compare(net, MatchSettings(), case(STAND_S), True, False)
    assert changed["_close_stand_loops"]
    chain, before = _build(view, case(STAND_S))
    closed = _tracker(net, MatchSettings(), case(STAND_S))._close_stand_loops(chain, before,
                                                                              EPS)
    assert [n.seg for n in closed[:11]] == [west] * 11
    assert [(n.x, n.y) for n in closed[:11]] == [(0.0, 0.0)] * 11
    assert not _compare(net, MatchSettings(), case(UNDER), True, False)["_close_stand_loops"]
    # the same loop as the chain's only nodes (no node after it): spans a hair less
    # than STAND_S, so the early return is taken, and the scan closes nothing either
    only = case(UNDER)
    only = replace(only, nodes=only.nodes[:-1], fixes=only.fixes[:-1])
    assert not any(_compare(net, MatchSettings(), only, True, False).values())
