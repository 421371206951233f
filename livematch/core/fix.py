"""The position fix: one decoded, validated GPS report of one vehicle."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, slots=True, init=False)
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

    One is made per message, so ``__init__`` is written by hand: it stores each field
    through its slot (the frozen dataclass's generated ``__init__`` goes through
    ``object.__setattr__`` by name, about twice the cost). Equality, ``repr`` and the
    refusal to assign a field afterwards are the dataclass's own.

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

    def __init__(self, vehicle: str, t: float, lon: float, lat: float, x: float, y: float,
                 accuracy: float | None = None, speed: float | None = None,
                 heading: float | None = None, route: str | None = None) -> None:
        _set_vehicle(self, vehicle)
        _set_t(self, t)
        _set_lon(self, lon)
        _set_lat(self, lat)
        _set_x(self, x)
        _set_y(self, y)
        _set_accuracy(self, accuracy)
        _set_speed(self, speed)
        _set_heading(self, heading)
        _set_route(self, route)


# The slots' own setters (bypass the frozen __setattr__, as the generated __init__ does).
_set_vehicle = Fix.__dict__["vehicle"].__set__
_set_t = Fix.__dict__["t"].__set__
_set_lon = Fix.__dict__["lon"].__set__
_set_lat = Fix.__dict__["lat"].__set__
_set_x = Fix.__dict__["x"].__set__
_set_y = Fix.__dict__["y"].__set__
_set_accuracy = Fix.__dict__["accuracy"].__set__
_set_speed = Fix.__dict__["speed"].__set__
_set_heading = Fix.__dict__["heading"].__set__
_set_route = Fix.__dict__["route"].__set__
