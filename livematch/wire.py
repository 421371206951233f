"""The msgspec structs of the position message and of the vehicle checkpoint.

They live here, in a module that stays pure Python, rather than beside their readers
(:mod:`livematch.feed.decode`, :mod:`livematch.pipeline`): those are compiled with mypyc
(setup.py ``NATIVE``), which compiles a ``msgspec.Struct`` subclass as a plain Python
class whose field annotations msgspec can no longer read (every message would be refused
as ``bad_type``). msgspec reads these annotations here, as written.
"""

from __future__ import annotations

import msgspec

__all__ = ["Blob", "Message"]


class Message(msgspec.Struct, frozen=True):
    """A position message's wire form (read by :mod:`livematch.feed.decode`).

    Types are enforced by msgspec while parsing, ranges afterwards.
    """

    time: str | float
    lat: float
    lon: float
    vehicle: str | None = None
    accuracy: float | None = None
    speed: float | None = None
    heading: float | None = None
    route: str | None = None


class Blob(msgspec.Struct, array_like=True, frozen=True):
    """A vehicle checkpoint's layout after the magic and version byte (a msgpack array).

    Written and read by :meth:`livematch.pipeline.Pipeline.export_vehicle` and
    ``import_vehicle``.
    """

    vehicle: str
    recent: list[float]
    tracker: bytes
    alerts: bytes = b""  # the monitors' state: v3 msgpack, v2 zlib-compressed JSON
