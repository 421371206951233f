"""The position fix: one decoded, validated GPS report of one vehicle."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Fix:
    """One vehicle position, already projected to the network's metres.

    Attributes:
        vehicle: vehicle id (validated by the shell: no ``/ + #`` or control characters).
        t: the fix's own time, epoch seconds (UTC). The core's only clock.
        lon, lat: WGS84 degrees as received.
        x, y: projected metres in the network's CRS.
        accuracy: reported horizontal accuracy in metres, if any.
        speed: reported speed in m/s, if any.
        heading: reported heading in degrees clockwise from north, if any.
        route: assigned route id carried by the message, if any.
    """

    vehicle: str
    t: float
    lon: float
    lat: float
    x: float
    y: float
    accuracy: float | None = None
    speed: float | None = None
    heading: float | None = None
    route: str | None = None
