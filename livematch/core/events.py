"""What the core emits for each fix: assignments, commits, alerts and filter verdicts.

Events carry segment indices and projected metres; :func:`to_record` turns one into the
JSON-ready dict of the published contract (WGS84, source ids), which is pinned by tests
and documented in the README. The daemon publishes these records and ``livematch replay``
writes them, so both produce the same bytes for the same input.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from math import floor
from typing import Any, Final

from livematch.core.network import RoadNetwork

#: Whether this module runs compiled (mypyc, setup.py ``NATIVE``: loaded from an
#: extension module, not from a ``.py`` or ``.pyc``): the hand-written ``__init__``
#: methods below then store each field directly into the native object; as Python they
#: go through the slots' own setters (the frozen ``__setattr__`` would refuse a plain
#: assignment).
_COMPILED: Final = not __file__.endswith((".py", ".pyc"))


@dataclass(frozen=True, slots=True, init=False)
class Assignment:
    """The live road assignment of one accepted fix (provisional: ``committed`` false).

    ``eps_m`` with ``window_fixes`` / ``window_s`` is the certificate: the last
    ``window_fixes`` fixes (spanning ``window_s`` seconds) lie within Fréchet distance
    ``eps_m`` of a road path ending on ``segment``.

    One is made per accepted fix, so ``__init__`` (as those of :class:`MatchedFix` and
    :class:`Commit`) is written by hand: compiled (mypyc) it stores each field straight
    into the native object (the dataclass's generated ``__init__``, Python even in a
    compiled class, sets each field by name); as Python it stores through the slots (the generated
    one goes through ``object.__setattr__`` by name, about twice the cost). Equality,
    ``repr`` and immutability are the dataclass's own.
    """

    vehicle: str
    t: float
    segment: int
    offset_m: float
    x: float
    y: float
    eps_m: float
    window_fixes: int
    window_s: float
    kind: str = field(default="assignment", init=False)

    def __init__(self, vehicle: str, t: float, segment: int, offset_m: float, x: float,
                 y: float, eps_m: float, window_fixes: int, window_s: float) -> None:
        if _COMPILED:  # native object: direct stores (its frozen __setattr__ is not called)
            self.vehicle = vehicle  # type: ignore[misc]
            self.t = t  # type: ignore[misc]
            self.segment = segment  # type: ignore[misc]
            self.offset_m = offset_m  # type: ignore[misc]
            self.x = x  # type: ignore[misc]
            self.y = y  # type: ignore[misc]
            self.eps_m = eps_m  # type: ignore[misc]
            self.window_fixes = window_fixes  # type: ignore[misc]
            self.window_s = window_s  # type: ignore[misc]
            self.kind = "assignment"  # type: ignore[misc]
            return
        # pure Python: through the slots' own setters, as the generated __init__ does
        _a_vehicle(self, vehicle)
        _a_t(self, t)
        _a_segment(self, segment)
        _a_offset_m(self, offset_m)
        _a_x(self, x)
        _a_y(self, y)
        _a_eps_m(self, eps_m)
        _a_window_fixes(self, window_fixes)
        _a_window_s(self, window_s)
        _a_kind(self, "assignment")

    def __reduce__(self) -> tuple[type[Assignment], tuple[object, ...]]:
        """Pickle as a call of the constructor.

        The compiled class (setup.py ``NATIVE``) cannot be restored field by field as
        pickle would: its frozen ``__setattr__`` refuses.
        """
        return type(self), (self.vehicle, self.t, self.segment, self.offset_m, self.x,
                            self.y, self.eps_m, self.window_fixes, self.window_s)


@dataclass(frozen=True, slots=True, init=False)
class HeldAssignment(Assignment):
    """The newest live answer repeated for a fix the filters refused (``hold_filtered``).

    Same fields and certificate as the answer it repeats (the certificate's window ends
    at the last accepted fix; the refused fix is in no window). Published with
    ``"held": true`` so that a consumer can tell a repeated position from one this fix
    supports: a dispatcher shown a held position should know the device's latest fix
    was not believed.
    """


@dataclass(frozen=True, slots=True, init=False)
class MatchedFix:
    """The final answer for one fix inside a commit."""

    t: float
    segment: int
    offset_m: float
    x: float
    y: float

    def __init__(self, t: float, segment: int, offset_m: float, x: float, y: float) -> None:
        if _COMPILED:  # native object: direct stores (its frozen __setattr__ is not called)
            self.t = t  # type: ignore[misc]
            self.segment = segment  # type: ignore[misc]
            self.offset_m = offset_m  # type: ignore[misc]
            self.x = x  # type: ignore[misc]
            self.y = y  # type: ignore[misc]
            return
        # pure Python: through the slots' own setters, as the generated __init__ does
        _m_t(self, t)
        _m_segment(self, segment)
        _m_offset_m(self, offset_m)
        _m_x(self, x)
        _m_y(self, y)

    def __reduce__(self) -> tuple[type[MatchedFix], tuple[object, ...]]:
        """Pickle as a call of the constructor (see :meth:`Assignment.__reduce__`)."""
        return type(self), (self.t, self.segment, self.offset_m, self.x, self.y)


@dataclass(frozen=True, slots=True, init=False)
class Commit:
    """A settled stretch: final answers for some fixes and the connected path driven."""

    vehicle: str
    fixes: tuple[MatchedFix, ...]
    path: tuple[int, ...]
    kind: str = field(default="commit", init=False)

    def __init__(self, vehicle: str, fixes: tuple[MatchedFix, ...],
                 path: tuple[int, ...]) -> None:
        if _COMPILED:  # native object: direct stores (its frozen __setattr__ is not called)
            self.vehicle = vehicle  # type: ignore[misc]
            self.fixes = fixes  # type: ignore[misc]
            self.path = path  # type: ignore[misc]
            self.kind = "commit"  # type: ignore[misc]
            return
        # pure Python: through the slots' own setters, as the generated __init__ does
        _c_vehicle(self, vehicle)
        _c_fixes(self, fixes)
        _c_path(self, path)
        _c_kind(self, "commit")

    def __reduce__(self) -> tuple[type[Commit], tuple[object, ...]]:
        """Pickle as a call of the constructor (see :meth:`Assignment.__reduce__`)."""
        return type(self), (self.vehicle, self.fixes, self.path)


# The slots' own setters, for the hand-written __init__ methods above when they run as
# Python (they bypass the frozen __setattr__, as the generated __init__ does).
_a_vehicle, _a_t, _a_segment, _a_offset_m, _a_x, _a_y, _a_eps_m, _a_window_fixes, \
    _a_window_s, _a_kind = (vars(Assignment)[name].__set__ for name in (
        "vehicle", "t", "segment", "offset_m", "x", "y", "eps_m", "window_fixes", "window_s",
        "kind"))
_m_t, _m_segment, _m_offset_m, _m_x, _m_y = (
    vars(MatchedFix)[name].__set__ for name in ("t", "segment", "offset_m", "x", "y"))
_c_vehicle, _c_fixes, _c_path, _c_kind = (
    vars(Commit)[name].__set__ for name in ("vehicle", "fixes", "path", "kind"))


@dataclass(frozen=True, slots=True)
class Alert:
    """An alert of one ``alert_kind`` (e.g. ``off_route``) with the facts behind it."""

    vehicle: str
    t: float
    alert_kind: str
    facts: dict[str, Any]
    kind: str = field(default="alert", init=False)

    def __reduce__(self) -> tuple[type[Alert], tuple[object, ...]]:
        """Pickle as a call of the constructor (see :meth:`Assignment.__reduce__`)."""
        return type(self), (self.vehicle, self.t, self.alert_kind, self.facts)


@dataclass(frozen=True, slots=True)
class Filtered:
    """A fix the core refused before the sweep, with a reason code (counted, not published)."""

    vehicle: str
    t: float
    reason: str
    kind: str = field(default="filtered", init=False)

    def __reduce__(self) -> tuple[type[Filtered], tuple[object, ...]]:
        """Pickle as a call of the constructor (see :meth:`Assignment.__reduce__`)."""
        return type(self), (self.vehicle, self.t, self.reason)


Event = Assignment | HeldAssignment | Commit | Alert | Filtered


def _segment_record(network: RoadNetwork, segment: int) -> dict[str, int]:
    way, from_node, to_node = network.source_ids(segment)
    return {"way": way, "from_node": from_node, "to_node": to_node}


def _lonlat(network: RoadNetwork, x: float, y: float) -> tuple[float, float]:
    lon, lat = network.projection.point_to_lonlat(x, y)
    return round(lon, 7), round(lat, 7)


def to_record(event: Event, network: RoadNetwork) -> dict[str, Any]:
    """The JSON-ready published form of an event (the output contract).

    Coordinates are rounded to 1e-7 degree (about 1 cm) and metres to 1 mm, so that the
    output bytes are stable across platforms.
    """
    if isinstance(event, Assignment):
        lon, lat = _lonlat(network, event.x, event.y)
        return {
            "vehicle": event.vehicle,
            "time": event.t,
            "lat": lat,
            "lon": lon,
            **_segment_record(network, event.segment),
            "offset_m": round(event.offset_m, 3),
            "road": network.road_name(event.segment),
            "eps_m": event.eps_m,
            "window_fixes": event.window_fixes,
            "window_s": round(event.window_s, 3),
            "committed": False,
            **({"held": True} if type(event) is HeldAssignment else {}),
        }
    if isinstance(event, Commit):
        fixes = []
        for f in event.fixes:
            lon, lat = _lonlat(network, f.x, f.y)
            fixes.append({
                "time": f.t,
                "lat": lat,
                "lon": lon,
                **_segment_record(network, f.segment),
                "offset_m": round(f.offset_m, 3),
            })
        return {
            "vehicle": event.vehicle,
            "fixes": fixes,
            "path": [_segment_record(network, s) for s in event.path],
        }
    if isinstance(event, Alert):
        return {"vehicle": event.vehicle, "time": event.t, "kind": event.alert_kind,
                **event.facts}
    return {"vehicle": event.vehicle, "time": event.t, "reason": event.reason}


#: Fast rounding only below this magnitude of ``x * 10**ndigits`` (2**31): there the
#: product is within 2**-23 of the exact one, far inside the 1e-6 margin around ties.
_FAST_ROUND_LIMIT = 2147483648.0


def rounded(x: float, scale: float, ndigits: int) -> float:
    """``round(x, ndigits)`` exactly, for less than the built-in costs on ordinary values.

    ``scale`` is ``10.0 ** ndigits``; the result is the same double, sign of zero included.

    The built-in rounds the exact decimal value of ``x`` half-to-even and returns the
    double nearest to the result. Here the integer ``n`` nearest to ``x * scale`` is
    found from the floating-point product, which differs from the exact product by at
    most 2**-23 when it is below 2**31; when its fraction is more than 1e-6 away from
    one half, ``n`` is certain, and ``n / scale`` (two exact doubles, one correctly
    rounded division) is the double nearest to ``n / 10**ndigits``, as the built-in's.
    Near a tie, for a zero result (whose sign the built-in keeps), and for huge or
    non-finite values it calls the built-in.

    Example (the last one is a near-tie, handed to the built-in):
        >>> rounded(24.94123456789, 1e7, 7), rounded(-0.00000001, 1e7, 7), rounded(2.675, 1e2, 2)
        (24.9412346, -0.0, 2.67)
    """
    r = x * scale
    if -_FAST_ROUND_LIMIT < r < _FAST_ROUND_LIMIT:
        n = floor(r)
        frac = r - n
        if frac < 0.499999:
            if n:
                return n / scale
        elif frac > 0.500001:
            n += 1
            if n:
                return n / scale
    return round(x, ndigits)


#: How many recent matched points a :class:`RecordBuilder` remembers at most (about 200
#: bytes each): the newest half or more are always held (two generations of half this).
POINTS_HELD = 2048


#: Where the segments' ``(way, from_node, to_node, road)`` read so far are kept on the
#: :class:`~livematch.core.network.RoadNetwork` (as its view and sweep arrays are).
_SEGMENT_IDS_ATTR = "_record_segment_ids"


class RecordBuilder:
    """:func:`to_record` for one network, with the per-segment lookups cached.

    A record names every segment by its source ids and road name, which
    :func:`to_record` reads from the network's arrays each time (five numpy scalar
    reads and a dict lookup per segment, a few microseconds). A commit repeats the
    segments of the assignments before it, so the builder keeps each segment's
    ``(way, from_node, to_node, road)`` once read: at most one small tuple per segment
    of the network, and only for segments some vehicle was matched to. The table is
    kept on the network, shared by every builder made for it (the ids never change).

    A commit mostly repeats the matched points too: the final answer for a fix is the
    point its assignment had (four in five fixes on 1 Hz OSM drives). So the rounded
    WGS84 position of each assignment's point is kept, keyed by the projected point,
    until a commit takes it, in two generations: when the newer one holds half of
    :data:`POINTS_HELD`, it becomes the older one and the older one is dropped (the
    points of the last thousand or more assignments of the whole fleet are held; memory
    bounded, every operation O(1)). A commit's fix at such a point reuses the position
    instead of projecting it again. The same point always gives the same position, so
    this changes no record (a point with a zero coordinate is not kept: 0.0 and -0.0
    are equal keys of different inputs).

    The records are equal to :func:`to_record`'s, key order included (tests compare the
    two on OSM drives), so the published bytes do not change. Pure: no clock, no I/O.

    Example (a degenerate commit: no fixes, no path):
        >>> from livematch.core.build import Road, network_from_roads
        >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=7)])
        >>> RecordBuilder(net).record(Commit("bus17", (), ()))
        {'vehicle': 'bus17', 'fixes': [], 'path': []}
    """

    __slots__ = ("_inverse", "_older", "_points", "_segments", "network")

    def __init__(self, network: RoadNetwork) -> None:
        self.network = network
        self._inverse = network.projection.point_to_lonlat
        # shared by every builder on this network (the ids never change; a process that
        # makes several pipelines on one network reads each segment once)
        segments = getattr(network, _SEGMENT_IDS_ATTR, None)
        if segments is None:
            segments = {}
            setattr(network, _SEGMENT_IDS_ATTR, segments)
        self._segments: dict[int, tuple[int, int, int, str | None]] = segments
        # projected point of a recent assignment -> its rounded (lat, lon): the newer
        # and the older generation
        self._points: dict[tuple[float, float], tuple[float, float]] = {}
        self._older: dict[tuple[float, float], tuple[float, float]] = {}

    def points_held(self) -> int:
        """How many assignment points are remembered now (at most :data:`POINTS_HELD`)."""
        return len(self._points) + len(self._older)

    def _position(self, x: float, y: float) -> tuple[float, float]:
        """The rounded (lat, lon) of a projected point (not remembered)."""
        lon, lat = self._inverse(x, y)
        return rounded(lat, 1e7, 7), rounded(lon, 1e7, 7)

    def _segment(self, segment: int) -> tuple[int, int, int, str | None]:
        """(way, from_node, to_node, road name) of a segment, read once."""
        ids = self._segments.get(segment)
        if ids is None:
            way, from_node, to_node = self.network.source_ids(segment)
            ids = self._segments[segment] = (way, from_node, to_node,
                                             self.network.road_name(segment))
        return ids

    def record(self, event: Event) -> dict[str, Any]:
        """The same dict as ``to_record(event, network)``."""
        if type(event) is Assignment:  # exact type, cheaper than isinstance (HeldAssignment: below)
            x = event.x
            y = event.y
            points = self._points
            key = (x, y)
            at = points.get(key)
            if at is None:
                at = self._older.get(key)
                if at is None:
                    at = self._position(x, y)
                if x and y:  # no zero coordinate (see the class docstring)
                    if 2 * len(points) >= POINTS_HELD:
                        self._older = points
                        points = self._points = {}
                    points[key] = at
            ids = self._segments.get(event.segment)
            if ids is None:
                ids = self._segment(event.segment)
            return {
                "vehicle": event.vehicle,
                "time": event.t,
                "lat": at[0],
                "lon": at[1],
                "way": ids[0],
                "from_node": ids[1],
                "to_node": ids[2],
                "offset_m": rounded(event.offset_m, 1e3, 3),
                "road": ids[3],
                "eps_m": event.eps_m,
                "window_fixes": event.window_fixes,
                "window_s": rounded(event.window_s, 1e3, 3),
                "committed": False,
            }
        if type(event) is Commit:
            known = self._segments
            segment = self._segment
            taken = self._points.pop
            fixes = []
            for f in event.fixes:
                key = (f.x, f.y)
                at = taken(key, None)  # the point of its assignment, mostly
                if at is None:
                    at = self._older.pop(key, None)
                    if at is None:
                        at = self._position(f.x, f.y)
                ids = known.get(f.segment)
                if ids is None:
                    ids = segment(f.segment)
                fixes.append({
                    "time": f.t,
                    "lat": at[0],
                    "lon": at[1],
                    "way": ids[0],
                    "from_node": ids[1],
                    "to_node": ids[2],
                    "offset_m": rounded(f.offset_m, 1e3, 3),
                })
            path = []
            for s in event.path:
                ids = known.get(s)
                if ids is None:
                    ids = segment(s)
                path.append({"way": ids[0], "from_node": ids[1], "to_node": ids[2]})
            return {"vehicle": event.vehicle, "fixes": fixes, "path": path}
        return to_record(event, self.network)


def plain_json(value: Any) -> bool:
    """Whether msgspec's JSON encoder writes ``value`` byte for byte as ``json.dumps`` does.

    True for a dict with str keys, or a list or tuple, whose values are str, int, bool,
    None, floats that are finite and that Python writes without an exponent, or again
    such dicts, lists and tuples (exact types: a subclass, a numpy scalar, anything else
    gives False). The two encoders differ only in a float's exponent form (Python:
    ``1e-05``, ``1e+16``; msgspec: ``0.00001``, ``1e16``; Python uses it for a non-zero
    float below 1e-4 or at least 1e16 in absolute value) and in NaN and infinity (Python
    with ``allow_nan=False`` refuses them, msgspec writes ``null``). The daemon
    (``livematch.service.daemon.encode_record``) encodes every published record with
    msgspec when this is True and through ``json.dumps`` otherwise, so no NaN or
    infinity is ever published and the bytes are those ``livematch replay`` writes.

    It lives in this compiled module (setup.py ``NATIVE``) because it runs on every
    output: compiled, the type tests are pointer comparisons and a float's test is on
    the C double. One loop per container; a call only for a nested container.

    Example:
        >>> plain_json({"vehicle": "v", "offset_m": 12.5, "fixes": [{"time": 1.0}]})
        True
        >>> plain_json({"offset_m": 0.00001}), plain_json({"eps_m": float("nan")})
        (False, False)
    """
    if type(value) is dict:
        for k, v in value.items():
            if type(k) is not str:
                return False
            if type(v) is float:
                if not (v == 0.0 or 1e-4 <= v < 1e16 or -1e16 < v <= -1e-4):
                    return False  # NaN fails every comparison, infinity the bounds
            elif not (type(v) is str or type(v) is int or v is None or type(v) is bool
                      or plain_json(v)):
                return False
        return True
    if type(value) is list or type(value) is tuple:
        for v in value:
            if type(v) is float:
                if not (v == 0.0 or 1e-4 <= v < 1e16 or -1e16 < v <= -1e-4):
                    return False
            elif not (type(v) is str or type(v) is int or v is None or type(v) is bool
                      or plain_json(v)):
                return False
        return True
    return False
