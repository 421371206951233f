"""Simulated drives with known ground truth, for measuring map-matching accuracy.

:mod:`livematch.sim.drive` builds a drive on a :class:`~livematch.core.network.RoadNetwork`
(route: a random walk, or routed trips with dwells; speed profile, 1 Hz truth, correlated
GPS error and outliers), pure and seeded: the caller passes a
:class:`numpy.random.Generator`, nothing reads the wall clock.
:mod:`livematch.sim.score` holds the accuracy measures and :mod:`livematch.sim.logs`
turns drives into a replay log and a truth file (the only module here that writes files).
"""

from __future__ import annotations

from livematch.sim.drive import (
    Drive,
    DriveSettings,
    Observation,
    TruthPoint,
    fastest_path,
    gauss_markov,
    observe,
    random_route,
    simulate_drive,
    travel_times,
    trip_route,
)

__all__ = [
    "Drive",
    "DriveSettings",
    "Observation",
    "TruthPoint",
    "fastest_path",
    "gauss_markov",
    "observe",
    "random_route",
    "simulate_drive",
    "travel_times",
    "trip_route",
]
