"""Route adherence: the Fréchet sweep against a vehicle's assigned route.

A route is a directed polyline in projected metres (a GTFS shape, a GeoJSON line, or the
roads of a list of way ids; the shell loads them). :class:`RouteChain` turns it into two
chain graphs (:class:`~livematch.core.network.RoadNetwork` of one-way segments: the route
and the route reversed) so the matcher's own sweep (:mod:`livematch.core.sweep`) runs on
them unchanged, with a *free start*: a window starts on every part of the route within
``eps_route_m`` of its first fix. The shape points are not merged where the route meets
itself, so a route that overlaps itself (out and back on one street) is one long chain,
and a closed route (last point on the first) is a cycle that can be driven round and
round.

:class:`RouteMonitor` keeps, per vehicle, one sweep window per direction and a small
state machine:

* **progress**: metres from the route's start, from the forward sweep's reachable
  positions (the candidate that has followed the route longest).
* **off route**: the fixes have been farther than eps from the route (the sweep is dead
  and cannot restart) for ``off_route_s`` seconds *and* the vehicle got ``off_route_m``
  metres away from its last on-route fix or stands 2 eps or more from the route. One
  ``off_route`` alert per episode.
* **back on route**: ``on_route_fixes`` consecutive fixes within eps again, not against
  the route's direction; the ``on_route`` alert carries the detour's duration and
  length.
* **wrong direction**: the reversed-route sweep has followed the fixes for
  ``wrong_way_m`` metres while the forward sweep died in that time (it must: a Fréchet
  match is monotone, so moving backwards more than 2 eps kills it) and has not followed
  them for eps / 2 since, over at least ``on_route_fixes`` fixes (with fixes far apart,
  the straight chords cut across hairpin bends and one chord proves nothing), at two
  fixes in a row (one outlier landing on an earlier stretch of the route proves nothing
  either). Where two parts of a route run side by side in opposite
  directions (within eps), driving one forward is driving the other backwards; the
  forward sweep then follows too, and that is not wrong direction.

Units: metres and seconds; alert positions in WGS84 (the fix's own lat/lon).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Final

import numpy as np
import numpy.typing as npt
import shapely

from livematch.core._direct import Direct
from livematch.core.events import Alert
from livematch.core.fastsweep import SweepArrays, sweep_arrays
from livematch.core.fix import Fix
from livematch.core.geometry import Projection
from livematch.core.monitors import _route_kernel as _rk
from livematch.core.monitors.settings import AlertSettings
from livematch.core.network import RoadNetwork
from livematch.core.view import NetworkView, view_of

FloatArray = npt.NDArray[np.float64]

#: Two route ends closer than this (metres) make the route a closed loop.
CLOSE_LOOP_M: Final = 1.0


@dataclass(frozen=True, eq=False)
class Route:
    """A directed route polyline in projected metres.

    Attributes:
        id: the route id vehicles refer to.
        xy: (n, 2) shape points in driving order, metres (n >= 2 distinct points).
        name: a human name, if the source has one.
    """

    id: str
    xy: FloatArray
    name: str | None = None


def _chain_network(points: FloatArray, closed: bool, projection: Projection) -> RoadNetwork:
    """A one-way chain (or cycle) through ``points``; vertex i is point i, never merged."""
    n = len(points)
    seg_from = list(range(n - 1)) + ([n - 1] if closed else [])
    seg_to = list(range(1, n)) + ([0] if closed else [])
    return RoadNetwork(
        projection=projection, node_xy=points, node_id=np.arange(1, n + 1, dtype=np.int64),
        seg_from=np.array(seg_from, dtype=np.int32), seg_to=np.array(seg_to, dtype=np.int32),
        seg_way=np.zeros(len(seg_from), dtype=np.int64),
        seg_road=np.zeros(len(seg_from), dtype=np.int32),
        roads=[{"name": None, "ref": None, "highway": "route"}], source="route",
    )


class RouteChain:
    """A route prepared for the sweep: forward and reversed chains, arc lengths, a line.

    Args:
        route: the route.
        projection: the road network's projection (the route's ``xy`` are in it).

    Raises:
        ValueError: when the route has fewer than two distinct points.

    Example (a 100 m straight route; degenerate routes are refused):
        >>> c = RouteChain(Route("r", np.array([[0.0, 0.0], [100.0, 0.0]])),
        ...                Projection.local(0, 0))
        >>> c.length, c.closed, c.progress(0, 0.25)
        (100.0, False, 25.0)
        >>> RouteChain(Route("r", np.array([[5.0, 5.0], [5.0, 5.0]])), Projection.local(0, 0))
        Traceback (most recent call last):
        ...
        ValueError: route 'r' needs at least two distinct points, got 1
    """

    def __init__(self, route: Route, projection: Projection) -> None:
        xy = np.asarray(route.xy, dtype=np.float64).reshape(-1, 2)
        keep = np.ones(len(xy), dtype=bool)
        keep[1:] = np.any(np.diff(xy, axis=0) != 0.0, axis=1)
        pts = xy[keep]
        if len(pts) < 2:
            raise ValueError(f"route {route.id!r} needs at least two distinct points, "
                             f"got {len(pts)}")
        self.closed = bool(len(pts) >= 4
                           and math.hypot(*(pts[-1] - pts[0])) <= CLOSE_LOOP_M)
        if self.closed:
            pts = pts[:-1]
        self.route = route
        self.points = np.ascontiguousarray(pts)
        self.forward = _chain_network(self.points, self.closed, projection)
        self.backward = _chain_network(self.points[::-1].copy(), self.closed, projection)
        self.forward_view: NetworkView = view_of(self.forward)
        self.backward_view: NetworkView = view_of(self.backward)
        # the compiled window step's arrays (read-only chain, scratch grown on demand),
        # the scratch started small (_CHAIN_SCRATCH)
        self.forward_arrays = sweep_arrays(self.forward_view)
        self.backward_arrays = sweep_arrays(self.backward_view)
        self.forward_arrays.resize(*_CHAIN_SCRATCH)
        self.backward_arrays.resize(*_CHAIN_SCRATCH)
        self.share_scratch()
        # both chains' records in one array of each type, the chains' own arrays views
        # of it (no copy kept): route_advance takes two arrays instead of four
        fa, ba = self.forward_arrays, self.backward_arrays
        self.split_f = len(fa.netf)
        self.split_i = len(fa.neti)
        self.chainf = np.concatenate((fa.netf, ba.netf))
        self.chaini = np.concatenate((fa.neti, ba.neti))
        fa.netf, ba.netf = self.chainf[:self.split_f], self.chainf[self.split_f:]
        fa.neti, ba.neti = self.chaini[:self.split_i], self.chaini[self.split_i:]
        self.cum_forward: list[float] = _cumulative(self.forward.seg_len)
        self.cum_backward: list[float] = _cumulative(self.backward.seg_len)
        self._len_forward: list[float] = self.forward.seg_len.tolist()
        self._len_backward: list[float] = self.backward.seg_len.tolist()
        self.length = float(self.forward.seg_len.sum())
        ring = np.vstack([self.points, self.points[:1]]) if self.closed else self.points
        self.line = shapely.LineString(ring)
        shapely.prepare(self.line)
        self.projection = projection

    def share_scratch(self) -> None:
        """Give both chains the larger of their two scratch buffers.

        :func:`~livematch.core.monitors._route_kernel.route_advance` sweeps both windows
        in the forward chain's scratch (the chains have the same numbers of vertices and
        segments, so the same layout); the reversed chain's own is used only by
        :meth:`_Window.step` after an overflow, and is then grown on its own. Sharing
        changes no answer: the sweep kernel leaves its scratch as it found it.
        """
        fa = self.forward_arrays
        ba = self.backward_arrays
        src, dst = (fa, ba) if fa.cap_h >= ba.cap_h else (ba, fa)
        dst.fbuf = src.fbuf
        dst.ibuf = src.ibuf
        dst.cap_h, dst.cap_b, dst.cap_m, dst.cap_o = src.cap_h, src.cap_b, src.cap_m, src.cap_o
        dst.out_f0 = src.out_f0
        dst.out_i0 = src.out_i0

    def progress(self, segment: int, pos: float, backward: bool = False) -> float:
        """Metres from the route's start of position ``pos`` on chain ``segment``.

        With ``backward`` the segment is one of the reversed chain, and the result is
        still measured along the forward route.
        """
        if backward:
            along = self.cum_backward[segment] + pos * self._len_backward[segment]
            return self.length - along
        return self.cum_forward[segment] + pos * self._len_forward[segment]

    def distance(self, x: float, y: float) -> float:
        """Distance in metres from (x, y) to the route line."""
        return float(shapely.distance(self.line, shapely.Point(x, y)))

    def nearest(self, x: float, y: float) -> tuple[float, float]:
        """The point of the route line closest to (x, y), metres."""
        p = shapely.line_interpolate_point(self.line, shapely.line_locate_point(
            self.line, shapely.Point(x, y)))
        return float(shapely.get_x(p)), float(shapely.get_y(p))


#: Starting capacities of a route chain's sweep scratch (heap entries, vias, output rows,
#: offers; :meth:`~livematch.core.fastsweep.SweepArrays.resize`). The sweep kernel's
#: defaults are sized for a city network's shared scratch (about 260 KB per network); a
#: chain has two of its own per route, and a window holds a handful of states, so those
#: defaults cost half a megabyte per loaded route and spread every step's few writes over
#: dozens of memory pages. A step that needs more reports an overflow and the monitor
#: grows the scratch and steps again (:meth:`_Window.grow`): room changes no answer.
_CHAIN_SCRATCH: Final = (64, 256, 64, 128)
#: The window's cost weights (1 / (2 sigma^2) with sigma 5 m, 1 / beta with beta 10 m, no
#: turn-back or motion cost; :meth:`_Window.best` breaks ties by cost).
# (a tuple of any length: mypyc 2.4 reads a Final tuple of floats as never set)
_WINDOW_WEIGHTS: Final[tuple[float, ...]] = _rk.WINDOW_WEIGHTS
# both windows' step, once a fix, at its compiled code (livematch.core._direct)
_CALLS: Final = Direct(route_advance=_rk.route_advance)
# its answer, each window's (k, fresh, most, seg, pos): typed, so that the compiled
# module unpacks it without iterating
_Advanced = tuple[int, int, float, int, float, int, int, float, int, float]
_START_ROWS: Final = 4  # a new window's room for live states (grown when a step needs more)
#: A window with room for more than this many states while it holds no more than half
#: of that gives the room back (keeps this many): a fresh start beside many route
#: segments grows a window to hundreds of rows, kilobytes per vehicle kept for good
#: otherwise. Room changes no answer (a step that needs more grows it and runs again).
_KEEP_ROWS: Final = 16
_SHRINK_LEN: Final = 1 + _rk.ROW * _KEEP_ROWS
#: ... once it has followed the fixes this long: a window that dies and starts afresh
#: every few fixes (fixes far apart) would grow again at its next start, an extra pass
#: of the compiled start over the route each time.
_SETTLED_FIXES: Final = 16


def _step_scalars(eps: float, x0: float, y0: float, x1: float, y1: float,
                  chord: float) -> FloatArray:
    """The window kernel's step scalars, in :class:`StepContext`'s order."""
    return np.array((eps, x0, y0, x1, y1, chord, *_WINDOW_WEIGHTS))


def _cumulative(lengths: FloatArray) -> list[float]:
    return np.concatenate([[0.0], np.cumsum(lengths)[:-1]]).tolist()


class _Window:
    """One direction's sweep window: live states and metres followed since its start.

    ``w`` holds the live states in the compiled step's layout
    (:mod:`livematch.core.monitors._route_kernel`: a count, then per state ``seg, low,
    pos, x, y, cost, driven``), ``driven`` being how far (metres along the chain) the
    candidate has followed the route since the window started at ``start_t``.
    Back-pointers are cut after every step, so the state stays a handful of rows,
    rewritten in place by one compiled call per fix
    (:func:`~livematch.core.monitors._route_kernel.window_advance`), which also picks the
    best candidate.
    """

    __slots__ = ("best_pos", "best_seg", "fixes", "k", "most", "seq", "start_t", "t", "w")

    def __init__(self) -> None:
        self.w: FloatArray = np.zeros(1 + _rk.ROW * _START_ROWS)
        self.k = 0  # live states (rows of ``w`` in use)
        self.most = 0.0  # the largest driven metres (0 when dead)
        self.best_seg = -1  # the best candidate's segment (-1 when dead) and position
        self.best_pos = 0.0
        self.seq = 0  # the fix the live states belong to
        self.t = 0.0
        self.start_t = -math.inf
        self.fixes = 0  # fixes in the window

    @property
    def live(self) -> bool:
        """Whether the window has live states."""
        return self.k > 0

    def best(self) -> tuple[int, float] | None:
        """(segment, position) of the candidate that followed the route longest."""
        if self.k == 0:
            return None
        return self.best_seg, self.best_pos

    def followed(self) -> float:
        """Metres the best candidate followed the route in this window (0 when dead)."""
        return self.most

    def rows(self) -> list[list[float]]:
        """The live states as ``seg, low, pos, x, y, cost, driven`` rows."""
        k = self.k
        return self.w[1:1 + _rk.ROW * k].reshape(k, _rk.ROW).tolist()

    def step(self, arrays: SweepArrays, scalars: FloatArray, seq: int, t: float) -> None:
        """Advance by one fix: sweep, else start afresh from the chain segments near it.

        ``scalars`` are the kernel's step scalars (:func:`_step_scalars`), the same for
        both directions; ``arrays`` the direction's chain in the sweep kernel's layout.
        (:meth:`RouteMonitor.update` steps both windows in one call; this is its way
        round an overflow.)
        """
        while True:
            k, fresh, most, best_seg, best_pos = _rk.window_advance(
                arrays.netf, arrays.neti, arrays.fbuf, arrays.ibuf, scalars, self.w)
            if k >= 0:
                break
            self.grow(arrays, k, fresh)
        self.done(k, fresh, most, best_seg, best_pos, seq, t)

    def grow(self, arrays: SweepArrays, code: int, needed: int) -> None:
        """Make room after the kernel returned ``code`` (an overflow) with ``needed``."""
        if code == _rk.SWEEP_OVERFLOW:
            arrays.grow()
        elif code == _rk.ROWS_OVERFLOW:
            grown = np.zeros(1 + _rk.ROW * max(needed, 2 * (len(self.w) // _rk.ROW)))
            grown[:len(self.w)] = self.w
            self.w = grown

    def done(self, k: int, fresh: int, most: float, best_seg: int, best_pos: float,
             seq: int, t: float) -> None:
        """Take the compiled step's answer (:func:`~._route_kernel.window_advance`)."""
        self.k = k
        self.most = most
        self.best_seg = best_seg
        self.best_pos = best_pos
        if fresh:
            self.start_t = t
            self.fixes = 1 if k else 0
        else:
            self.fixes += 1
            if len(self.w) > _SHRINK_LEN:
                self.settle()
        self.seq = seq
        self.t = t

    def settle(self) -> None:
        """Give room back (keep :data:`_KEEP_ROWS`) once a grown window has settled."""
        if 2 * self.k <= _KEEP_ROWS and self.fixes >= _SETTLED_FIXES:
            self.w = self.w[:1 + _rk.ROW * _KEEP_ROWS].copy()

    def to_state(self) -> list[Any]:
        return [self.start_t if math.isfinite(self.start_t) else None, self.fixes,
                [[int(seg), self.seq, self.t, pos, x, y, cost, low, driven]
                 for seg, low, pos, x, y, cost, driven in self.rows()]]

    @classmethod
    def from_state(cls, state: list[Any]) -> _Window:
        w = cls()
        w.start_t = -math.inf if state[0] is None else state[0]
        w.fixes = state[1]
        rows = [[float(s), low, pos, x, y, cost, driven]
                for s, _, _, pos, x, y, cost, low, driven in state[2]]
        w.k = len(rows)
        w.w = np.zeros(1 + _rk.ROW * max(w.k, _START_ROWS))
        w.w[0] = w.k
        if rows:
            w.w[1:1 + _rk.ROW * w.k] = np.array(rows, dtype=np.float64).ravel()
            w.most = max(r[6] for r in rows)
            j = _rk.best_row(rows)
            w.best_seg, w.best_pos = int(rows[j][0]), rows[j][2]
            w.seq, w.t = state[2][0][1], state[2][0][2]
        return w


@dataclass(slots=True)  # one per vehicle with a route: no instance dict
class _Anchor:
    """The last on-route fix: time, projected and WGS84 position, progress (or None)."""

    t: float
    x: float
    y: float
    lon: float
    lat: float
    progress: float | None


@dataclass(slots=True)  # one per vehicle with a route: no instance dict
class RouteMonitor:
    """Route adherence of one vehicle on one route (see the module docstring).

    Args:
        route_id: the id the vehicle was given (copied into every alert).
        chain: the prepared route.
        settings: the alert settings.

    Example (a vehicle driving along a 1 km route at 10 m/s: never an alert):
        >>> from livematch.core.geometry import Projection
        >>> chain = RouteChain(Route("r", np.array([[0.0, 0.0], [1000.0, 0.0]])),
        ...                    Projection.local(0, 0))
        >>> m = RouteMonitor("r", chain, AlertSettings())
        >>> [a for k in range(60) for a in m.update(Fix("v", k, 0, 0, 10.0 * k, 3.0))]
        []
        >>> m.state, round(m.progress_m, 1)
        ('on', 590.0)
    """

    route_id: str
    chain: RouteChain
    settings: AlertSettings
    state: str = "unknown"  # "unknown" (not yet confirmed), "on", "off"
    seq: int = 0
    last_xy: tuple[float, float] | None = None
    near: int = 0  # consecutive fixes within eps
    dead_since: float | None = None  # first fix of the current run farther than eps
    dead_origin: tuple[float, float] | None = None  # where that run is measured from
    dead_far: float = 0.0  # farthest the run got from dead_origin
    trail_m: float = 0.0  # path length of the fixes since the anchor
    rejoin: tuple[float, float] | None = None  # (t, trail_m) of the first fix of this near run
    anchor: _Anchor | None = None
    wrong: bool = False  # a wrong-direction episode is open
    wrong_seen: bool = False  # the previous fix looked like driving backwards
    progress_m: float | None = None
    fwd: _Window = field(default_factory=_Window)
    rev: _Window = field(default_factory=_Window)

    def update(self, fix: Fix) -> list[Alert]:
        """Take one accepted fix; return the alerts it causes (at most two)."""
        eps = self.settings.eps_route_m
        seq = self.seq = self.seq + 1
        x = fix.x
        y = fix.y
        last = self.last_xy
        x0, y0 = last if last is not None else (x, y)
        step_m = math.hypot(x - x0, y - y0)
        self.last_xy = (x, y)
        chain = self.chain
        fa = chain.forward_arrays
        fwd = self.fwd
        rev = self.rev
        answer: _Advanced = _CALLS.route_advance(
            chain.chainf, chain.chaini, chain.split_f, chain.split_i, fa.fbuf, fa.ibuf,
            fwd.w, rev.w, eps, x0, y0, x, y, step_m)
        k, fresh, most, seg, pos, bk, bfresh, bmost, bseg, bpos = answer
        t = fix.t
        if k >= 0:
            fwd.done(k, fresh, most, seg, pos, seq, t)
        else:  # an overflow: grow, then one window at a time (the scalars as an array)
            fwd.grow(fa, k, fresh)
            fwd.step(fa, _step_scalars(eps, x0, y0, x, y, step_m), seq, t)
        if bk >= 0:
            rev.done(bk, bfresh, bmost, bseg, bpos, seq, t)
        else:
            ba = chain.backward_arrays
            rev.grow(ba, bk, bfresh)
            rev.step(ba, _step_scalars(eps, x0, y0, x, y, step_m), seq, t)
        if k < 0 or bk < 0:
            chain.share_scratch()  # one of them grew: both sweep in the larger again
        self.trail_m += step_m  # reset at every on-route fix (the anchor)
        alerts: list[Alert] = []
        if fwd.k > 0:  # fwd.live
            self._near(fix, alerts)
        else:
            self._far(fix, alerts)
        return alerts

    def _backwards(self) -> bool:
        """Whether the fixes are following the route backwards.

        Either the forward sweep died while the reversed one kept following for eps, or
        both windows are young and the reversed one followed clearly farther (eps / 2),
        which tells a vehicle starting backwards from one standing still.
        """
        eps = self.settings.eps_route_m
        rev, fwd = self.rev.followed(), self.fwd.followed()
        return ((self.fwd.start_t > self.rev.start_t and rev >= eps)
                or rev - fwd >= eps / 2.0)

    def _near(self, fix: Fix, alerts: list[Alert]) -> None:
        # Runs at every fix on the route: the windows' fields are read directly (what
        # best(), followed() and RouteChain.progress return), _backwards written out.
        s = self.settings
        fwd = self.fwd
        rev = self.rev
        self.near += 1
        self.dead_since = None
        self.dead_origin = None
        self.dead_far = 0.0
        chain = self.chain
        seg = fwd.best_seg  # fwd.best(): the window is live
        self.progress_m = chain.cum_forward[seg] + fwd.best_pos * chain._len_forward[seg]
        if self.rejoin is None:
            self.rejoin = (fix.t, self.trail_m)
        eps = s.eps_route_m
        rev_m = rev.most
        fwd_m = fwd.most
        backwards = (fwd.start_t > rev.start_t and rev_m >= eps) or rev_m - fwd_m >= eps / 2.0
        backwards_now = (rev_m >= s.wrong_way_m
                         and rev.fixes >= s.on_route_fixes
                         and fwd.start_t > rev.start_t
                         and fwd_m < eps / 2.0)
        # Two fixes in a row, so one outlier landing on an earlier stretch of the route
        # cannot make it.
        confirmed, self.wrong_seen = backwards_now and self.wrong_seen, backwards_now
        if not self.wrong and confirmed:
            self.wrong = True
            rbest = self.rev.best()
            assert rbest is not None
            alerts.append(Alert(fix.vehicle, fix.t, "wrong_direction", {
                "route": self.route_id,
                "progress_m": _m(self.chain.progress(rbest[0], rbest[1], backward=True)),
                "backwards_m": _m(self.rev.followed()),
                "lat": fix.lat, "lon": fix.lon,
            }))
        elif self.wrong and fwd_m >= s.wrong_way_m:
            self.wrong = False
        if self.near >= s.on_route_fixes and not backwards:
            if self.state == "off" and self.anchor is not None:
                t_back, trail_back = self.rejoin
                alerts.append(Alert(fix.vehicle, fix.t, "on_route", {
                    "route": self.route_id,
                    "duration_s": _m(t_back - self.anchor.t),
                    "length_m": _m(trail_back),
                    "progress_m": _m(self.progress_m),
                    "lat": fix.lat, "lon": fix.lon,
                }))
            self.state = "on"
        if self.state == "on":
            a = self.anchor
            if a is None:
                self.anchor = _Anchor(fix.t, fix.x, fix.y, fix.lon, fix.lat, self.progress_m)
            else:  # moved in place (nothing else holds it)
                a.t, a.x, a.y, a.lon, a.lat, a.progress = (fix.t, fix.x, fix.y, fix.lon,
                                                           fix.lat, self.progress_m)
            self.trail_m = 0.0
            self.rejoin = None

    def _far(self, fix: Fix, alerts: list[Alert]) -> None:
        s = self.settings
        self.near = 0
        self.rejoin = None
        self.wrong_seen = False
        if self.dead_since is None:
            self.dead_since = fix.t
            if self.anchor is not None and self.state == "on":
                self.dead_origin = (self.anchor.x, self.anchor.y)
            else:
                self.dead_origin = (fix.x, fix.y)
        assert self.dead_origin is not None
        far = math.hypot(fix.x - self.dead_origin[0], fix.y - self.dead_origin[1])
        self.dead_far = max(self.dead_far, far)
        if self.state == "off" or fix.t - self.dead_since < s.off_route_s:
            return
        distance = self.chain.distance(fix.x, fix.y)
        # Far enough: moved off_route_m from the last on-route fix, or standing clearly
        # beyond the reach of jitter around eps (twice eps from the route).
        if self.dead_far >= s.off_route_m or distance >= 2.0 * s.eps_route_m:
            self.state = "off"
            self.wrong = False
            a = self.anchor
            rx, ry = self.chain.nearest(fix.x, fix.y)
            lon, lat = self.chain.projection.point_to_lonlat(rx, ry)
            alerts.append(Alert(fix.vehicle, fix.t, "off_route", {
                "route": self.route_id,
                "distance_m": _m(distance),
                "lat": fix.lat, "lon": fix.lon,
                "route_lat": round(lat, 7), "route_lon": round(lon, 7),
                "last_on_route_time": a.t if a else None,
                "last_on_route_lat": a.lat if a else None,
                "last_on_route_lon": a.lon if a else None,
                "last_progress_m": _m(a.progress) if a and a.progress is not None else None,
            }))

    # ---------------------------------------------------------------- state
    def to_state(self) -> dict[str, Any]:
        """JSON-ready state (floats kept exact); the route geometry is not included."""
        a = self.anchor
        return {
            "route": self.route_id, "state": self.state, "seq": self.seq,
            "last_xy": self.last_xy, "near": self.near, "dead_since": self.dead_since,
            "dead_origin": self.dead_origin, "dead_far": self.dead_far,
            "trail_m": self.trail_m, "rejoin": self.rejoin,
            "anchor": [a.t, a.x, a.y, a.lon, a.lat, a.progress] if a else None,
            "wrong": self.wrong, "wrong_seen": self.wrong_seen,
            "progress_m": self.progress_m,
            "fwd": self.fwd.to_state(), "rev": self.rev.to_state(),
        }

    @classmethod
    def from_state(cls, state: dict[str, Any], chain: RouteChain,
                   settings: AlertSettings) -> RouteMonitor:
        """Restore a monitor written by :meth:`to_state` onto the same route."""
        m = cls(state["route"], chain, settings)
        m.state = state["state"]
        m.seq = state["seq"]
        m.last_xy = _pair(state["last_xy"])
        m.near = state["near"]
        m.dead_since = state["dead_since"]
        m.dead_origin = _pair(state["dead_origin"])
        m.dead_far = state["dead_far"]
        m.trail_m = state["trail_m"]
        m.rejoin = _pair(state["rejoin"])
        m.anchor = _Anchor(*state["anchor"]) if state["anchor"] else None
        m.wrong = state["wrong"]
        m.wrong_seen = state["wrong_seen"]
        m.progress_m = state["progress_m"]
        m.fwd = _Window.from_state(state["fwd"])
        m.rev = _Window.from_state(state["rev"])
        return m


def _pair(value: list[float] | None) -> tuple[float, float] | None:
    return (value[0], value[1]) if value else None


def _m(value: float) -> float:
    """Metres or seconds as published: rounded to 0.1."""
    return round(float(value), 1)
