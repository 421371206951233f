"""The position fix: one decoded, validated GPS report of one vehicle."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Final

#: Whether this module runs compiled (mypyc, setup.py ``NATIVE``: loaded from an
#: extension module, not from a ``.py`` or ``.pyc``): the hand-written ``__init__``
#: methods below then store each field directly into the native object; as Python they
#: go through the slots' own setters (the frozen ``__setattr__`` would refuse a plain
#: assignment).
_COMPILED: Final = not __file__.endswith((".py", ".pyc"))


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

    One is made per message, so ``__init__`` is written by hand: compiled (mypyc) it
    stores each field straight into the native object (the dataclass's generated
    ``__init__``, Python even in a compiled class, sets each field by name); as Python it stores
    through the slots (the generated one goes through ``object.__setattr__`` by name,
    about twice the cost). Equality, ``repr`` and the refusal to assign a field
    afterwards are the dataclass's own.

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
        if _COMPILED:  # native object: direct stores (its frozen __setattr__ is not called)
            self.vehicle = vehicle  # type: ignore[misc]
            self.t = t  # type: ignore[misc]
            self.lon = lon  # type: ignore[misc]
            self.lat = lat  # type: ignore[misc]
            self.x = x  # type: ignore[misc]
            self.y = y  # type: ignore[misc]
            self.accuracy = accuracy  # type: ignore[misc]
            self.speed = speed  # type: ignore[misc]
            self.heading = heading  # type: ignore[misc]
            self.route = route  # type: ignore[misc]
            return
        # pure Python: through the slots' own setters, as the generated __init__ does
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

    def __reduce__(self) -> tuple[type[Fix], tuple[object, ...]]:
        """Pickle as a call of the constructor.

        The compiled class (setup.py ``NATIVE``) cannot be restored field by field as
        pickle would: its frozen ``__setattr__`` refuses.
        """
        return type(self), (self.vehicle, self.t, self.lon, self.lat, self.x, self.y,
                            self.accuracy, self.speed, self.heading, self.route)


# The slots' own setters (bypass the frozen __setattr__, as the generated __init__ does).
_set_vehicle = vars(Fix)["vehicle"].__set__
_set_t = vars(Fix)["t"].__set__
_set_lon = vars(Fix)["lon"].__set__
_set_lat = vars(Fix)["lat"].__set__
_set_x = vars(Fix)["x"].__set__
_set_y = vars(Fix)["y"].__set__
_set_accuracy = vars(Fix)["accuracy"].__set__
_set_speed = vars(Fix)["speed"].__set__
_set_heading = vars(Fix)["heading"].__set__
_set_route = vars(Fix)["route"].__set__
