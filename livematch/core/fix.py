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

    One is made per message: the compiled build (setup.py's ``NATIVE``) makes it a
    native class whose generated ``__init__`` stores each field directly; equality,
    ``repr`` and the refusal to assign a field afterwards are the dataclass's own.

    Example (a fix with none of the optional fields):
        >>> Fix("bus17", 1700000000.0, 24.94, 60.17, 0.0, 0.0)
        Fix(vehicle='bus17', t=1700000000.0, lon=24.94, lat=60.17, x=0.0, y=0.0, \
accuracy=None, speed=None, heading=None, route=None)
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

    def __reduce__(self) -> tuple[type[Fix], tuple[object, ...]]:
        """Pickle as a call of the constructor.

        The compiled class (setup.py ``NATIVE``) cannot be restored field by field as
        pickle would: its frozen ``__setattr__`` refuses.
        """
        return type(self), (self.vehicle, self.t, self.lon, self.lat, self.x, self.y,
                            self.accuracy, self.speed, self.heading, self.route)
