"""Simulate one vehicle driving a road network, with ground truth and noisy GPS fixes.

A drive is built in four steps, each seeded by the caller's :class:`numpy.random.Generator`
(no global random state, no wall clock, so the same seed gives the same drive):

1. **Route**: a random walk along directed segments inside the network's largest strongly
   connected part (so one-way streets are respected and the walk never gets stuck),
   preferring straight-ish continuations and never turning back on itself except at a
   dead end (:func:`random_route`). Opt-in (``DriveSettings.trips``): a chain of trips
   between random destinations, each routed by least travel time, with a dwell at each
   destination (:func:`trip_route`), the way a delivery van or a bus drives.
2. **Speed profile**: accelerate to a cruise speed that depends on the road class, slow
   down for turns and slower roads, stop at some junctions for 5–40 s; integrated in
   0.2 s steps and sampled at 1 Hz into :class:`TruthPoint` records (time, position,
   segment, offset along it, index into the path).
3. **GPS error**: a first-order Gauss–Markov (AR(1)) process per axis with time constant
   ``tau_s`` and stationary standard deviation ``sigma_m`` (:func:`gauss_markov`), plus
   rare single-fix outliers 50–300 m away in a random direction.
4. **Sampling**: :func:`observe` takes every ``interval_s``-th second of the 1 Hz truth
   and adds the error drawn for that second, so drives sampled at 1, 5, 15 and 30 s share
   their truth and their noise.

Units: metres, seconds; positions in the network's projected CRS.
"""

from __future__ import annotations

import heapq
import math
from dataclasses import dataclass, field

import networkx as nx
import numpy as np
import numpy.typing as npt

from livematch.core.network import RoadNetwork
from livematch.errors import BadNetworkError

FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]

#: Cruise speed per OpenStreetMap ``highway`` class, m/s. Typical urban free-flow speeds
#: (common practice, chosen by hand, not measured); unknown classes use ``DEFAULT_SPEED``.
ROAD_CLASS_SPEED: dict[str, float] = {
    "motorway": 25.0, "motorway_link": 14.0,
    "trunk": 20.0, "trunk_link": 12.0,
    "primary": 14.0, "primary_link": 10.0,
    "secondary": 12.5, "secondary_link": 9.0,
    "tertiary": 11.0, "tertiary_link": 8.0,
    "unclassified": 9.0, "residential": 8.0, "road": 8.0,
    "living_street": 4.0, "service": 5.0,
}
DEFAULT_SPEED = 8.0

_DT = 0.2  # integration step of the speed profile, s (5 steps per truth sample)


@dataclass(frozen=True, kw_only=True)
class DriveSettings:
    """How a simulated drive moves and how its GPS errs. Units: metres, seconds.

    Attributes:
        duration_s: length of the drive; the truth has ``duration_s + 1`` samples at 1 Hz
            (fewer only if the route ends first, which a long enough route avoids).
        sigma_m: stationary standard deviation of the GPS error *per axis* (east, north);
            the horizontal RMS error is ``sigma_m * sqrt(2)``.
        tau_s: time constant of the error's autocorrelation, ``exp(-lag / tau_s)``.
            Consumer GNSS error wanders over tens of seconds; 30–60 s is a typical value
            (from memory).
        outlier_p: probability that a fix is an outlier.
        outlier_min_m, outlier_max_m: an outlier is moved this far (uniform) in a uniform
            random direction, on top of the correlated error.
        stop_p: probability of stopping at a junction (a vertex with a real choice).
        stop_min_s, stop_max_s: stop duration, uniform.
        accel_mps2, decel_mps2: comfortable acceleration and braking (common practice).
        speed_factor: each drive's cruise speeds are scaled by a uniform factor in this
            range (drivers differ).
        straight_bias: the random walk weighs a continuation by ``exp(bias * cos(turn))``:
            0 is a uniform choice, larger values prefer going straight.
        delay_s: the receive delay of each fix (``at - time``), uniform in this range.
            Below 1 s it never reorders fixes sampled every second or slower.
        lead_s: lead-in and lead-out, seconds (opt-in; 0 keeps the original drives).
            The vehicle is simulated for ``duration_s + 2 * lead_s`` seconds, but its
            device reports only the middle ``duration_s``: it is already moving when the
            first fix is taken and keeps driving after the last, as a vehicle whose
            tracker is switched on mid-trip does. With 0 the drive starts at a vertex at
            standstill and the true path is cut at the segment of the last second, so a
            first fix whose GPS error points back along the road, or a last fix whose
            error points ahead, is matched onto a segment that is truly driven next to
            it but missing from the cut path, and scores as wrong although every interior
            fix gets the 30 m along-path tolerance both ways (an artefact of the harness,
            1-2 points of final accuracy at 15-30 s sampling, issue #3).
        revisit_factor: route model (opt-in; 1 keeps the original walk). Each time the
            walk has already driven a directed segment multiplies that segment's weight
            by this factor (0 < factor <= 1), so the walk prefers roads it has not
            driven. Without it the straight-biased walk can circle a short loop many
            times (one drive went round an 85 m two-way service loop 31 times), which no
            vehicle does and where, at a lap per fix, both directions fit equally. See
            :func:`random_route` for the choice of this model.
        trips: route model (opt-in; False keeps the random walk). The vehicle drives a
            chain of trips, each from where it is to a random destination, routed by
            least travel time, and dwells at each destination before the next trip
            (:func:`trip_route`), as a delivery van between addresses or a bus between
            termini does. Cannot be combined with ``revisit_factor`` (the walk's option).
        trip_min_m, trip_max_m: a destination lies this far, in a straight line, from
            the trip's origin (see :func:`trip_route` for why 0.5-4 km).
        dwell_s: dwell at each destination (a delivery, a layover), uniform in this
            range, seconds; the vehicle stands still at the destination vertex through
            the speed profile's stop mechanism, then leaves, turning round if the
            fastest way on is back the way it came.
        turn_round_mid_road: whether a trip may leave a destination that is a plain
            point in the middle of a road (a vertex joined to exactly two others) by the
            way the vehicle came (True, the default of the trip model). With False it
            goes on and turns round, if it must, at a junction or a dead end, as a bus
            or a truck that cannot turn in the street does.
        speed_sigma_mps: reported speed (opt-in; None sends none, as the drives always
            did). With a value each fix carries the speed over ground a GNSS receiver
            reports from the Doppler shift of the carriers (NMEA RMC's speed over
            ground, a phone's location speed; common practice in vehicle feeds): the
            true speed at that second plus white Gaussian error of this standard
            deviation, clipped at 0. Receivers quote about 0.1-0.5 m/s for it, far
            finer than a speed from two positions (from memory). Its errors are drawn
            after every other draw of the drive, so the drive and its fixes are the
            same with or without it.
        heading_sigma_deg: reported heading (opt-in; None sends none, as the drives
            always did). With a value each fix carries the course over ground a receiver
            reports (NMEA RMC's course, a phone's location bearing, GTFS-realtime's
            ``bearing``; degrees clockwise from true north): the true direction of
            travel (the driven segment's, turned from the grid to true north by the
            meridian convergence, :meth:`~livematch.core.geometry.Projection.north_bearing`)
            plus Gaussian error, reported only while the true speed is at least
            :data:`HEADING_MIN_MPS` (a receiver's course is noise at a stand: common
            practice to leave it out or flag it invalid there). The error has two tails
            of its own, chosen by judgement: a course is computed from the velocity, so
            its error grows as the speed falls, about the velocity's error over the
            speed (standard deviation ``sqrt(sigma^2 + atan(HEADING_SPEED_SIGMA_MPS /
            v)^2)``; 0.3 m/s, from memory, the order of the Doppler speed's error), and
            a share :data:`HEADING_OUTLIER_P` of the reported courses is any direction at
            all (multipath, a receiver's glitch; 1 %, as the positions' outliers). Drawn
            after every other draw (the speed's included), so the drive, its fixes and
            its speeds are the same with or without it.
    """

    duration_s: float = 900.0
    sigma_m: float = 5.0
    tau_s: float = 45.0
    outlier_p: float = 0.01
    outlier_min_m: float = 50.0
    outlier_max_m: float = 300.0
    stop_p: float = 0.1
    stop_min_s: float = 5.0
    stop_max_s: float = 40.0
    accel_mps2: float = 1.5
    decel_mps2: float = 2.0
    speed_factor: tuple[float, float] = (0.85, 1.1)
    straight_bias: float = 2.0
    delay_s: tuple[float, float] = (0.1, 0.9)
    lead_s: float = 0.0
    revisit_factor: float = 1.0
    trips: bool = False
    trip_min_m: float = 500.0
    trip_max_m: float = 4000.0
    dwell_s: tuple[float, float] = (10.0, 90.0)
    turn_round_mid_road: bool = True
    speed_sigma_mps: float | None = None
    heading_sigma_deg: float | None = None

    def __post_init__(self) -> None:
        if not (self.lead_s >= 0.0 and math.isfinite(self.lead_s)):
            raise ValueError(f"DriveSettings.lead_s must be >= 0 seconds, got {self.lead_s}")
        if not 0.0 < self.revisit_factor <= 1.0:
            raise ValueError(f"DriveSettings.revisit_factor must be in (0, 1], "
                             f"got {self.revisit_factor}")
        if self.trips and self.revisit_factor != 1.0:
            raise ValueError(f"DriveSettings.trips routes every trip by least time; "
                             f"revisit_factor={self.revisit_factor} (a random-walk option) "
                             f"cannot be combined with it")
        if not 0.0 <= self.trip_min_m <= self.trip_max_m:
            raise ValueError(f"DriveSettings needs 0 <= trip_min_m <= trip_max_m metres, "
                             f"got {self.trip_min_m}, {self.trip_max_m}")
        if not 0.0 <= self.dwell_s[0] <= self.dwell_s[1]:
            raise ValueError(f"DriveSettings.dwell_s must be (min, max) seconds with "
                             f"0 <= min <= max, got {self.dwell_s}")
        if self.speed_sigma_mps is not None and not (
                self.speed_sigma_mps >= 0.0 and math.isfinite(self.speed_sigma_mps)):
            raise ValueError(f"DriveSettings.speed_sigma_mps must be None or >= 0 m/s, "
                             f"got {self.speed_sigma_mps}")
        if self.heading_sigma_deg is not None and not (
                self.heading_sigma_deg >= 0.0 and math.isfinite(self.heading_sigma_deg)):
            raise ValueError(f"DriveSettings.heading_sigma_deg must be None or >= 0 degrees, "
                             f"got {self.heading_sigma_deg}")


#: The simulated receiver reports a course only at this true speed or faster, m/s
#: (``DriveSettings.heading_sigma_deg``; a course at a stand is noise, from memory).
HEADING_MIN_MPS = 1.0
#: The velocity error behind a simulated course, m/s: the course errs by about
#: ``atan(this / speed)`` more at low speed (from memory, as ``speed_sigma_mps``'s order).
HEADING_SPEED_SIGMA_MPS = 0.3
#: The share of simulated courses that point anywhere at all (judgement: as ``outlier_p``).
HEADING_OUTLIER_P = 0.01


#: Realistic drive model for the accuracy harness: a 60 s lead-in and lead-out (two
#: fixes either side even at 30 s sampling, and well past the first segment at urban
#: speeds) and a walk that weighs a directed segment by 0.1 per earlier pass. Values
#: chosen by judgement, not measured.
REALISTIC = {"lead_s": 60.0, "revisit_factor": 0.1}

#: Fleet drive model for the accuracy harness: routed trips with dwells
#: (``DriveSettings.trips``) and the same 60 s lead-in and lead-out as :data:`REALISTIC`.
TRIPS = {"lead_s": 60.0, "trips": True}


@dataclass(frozen=True, slots=True)
class TruthPoint:
    """Where the vehicle truly was at second ``t``.

    Attributes:
        t: epoch seconds.
        x, y: projected metres.
        segment: the directed segment driven.
        offset_m: distance from the segment's start.
        path_index: index of that segment in :attr:`Drive.path` (a segment can recur).
        path_pos_m: distance driven from the start of the path.
    """

    t: float
    x: float
    y: float
    segment: int
    offset_m: float
    path_index: int
    path_pos_m: float


@dataclass(frozen=True, slots=True)
class Observation:
    """One GPS fix as the vehicle would report it, with a link back to the truth.

    Attributes:
        t: the fix time (equal to the truth sample's time), epoch seconds.
        x, y: observed position, projected metres (truth + error).
        accuracy: the horizontal accuracy the device would report, metres.
        outlier: whether an outlier jump was added.
        truth_index: index of the matching sample in :attr:`Drive.truth`.
        delay_s: receive delay, seconds (the replay log's ``at`` is ``t + delay_s``).
        speed: the reported speed over ground, m/s, or None (see
            ``DriveSettings.speed_sigma_mps``).
        heading: the reported course, degrees clockwise from true north in [0, 360),
            or None (none reported: see ``DriveSettings.heading_sigma_deg``).
    """

    t: float
    x: float
    y: float
    accuracy: float
    outlier: bool
    truth_index: int
    delay_s: float
    # left out of the repr, which older digests of a drive's fixes hash (tests/test_sim.py)
    speed: float | None = field(default=None, repr=False)
    heading: float | None = field(default=None, repr=False)


@dataclass(frozen=True)
class Drive:
    """A simulated drive: its route, its 1 Hz truth and the error drawn for each second.

    Attributes:
        vehicle: vehicle id.
        path: the directed segments driven, in order, from the first to the last sample
            (lead-in and lead-out included).
        truth: one :class:`TruthPoint` per second, lead-in and lead-out included.
        error_xy: (n, 2) correlated GPS error per second, metres.
        outlier_xy: (n, 2) outlier jump per second (zero where there is none), metres.
        accuracy: (n,) reported accuracy per second, metres.
        delay: (n,) receive delay per second, seconds.
        observed: (first, last) indices into :attr:`truth` of the seconds the device
            reports (inclusive); ``None`` means all of them (no lead-in/out).
        trip_ends: with ``DriveSettings.trips``, the indices into :attr:`path` of the
            segments that start a new trip: the vehicle dwells at the start vertex of
            each (the previous trip's destination). Empty for the random walk.
        speed: (n,) reported speed per second, m/s, or None (no speed reported; see
            ``DriveSettings.speed_sigma_mps``).
        heading: (n,) reported course per second, degrees from true north, NaN where
            none is reported (too slow), or None (no course at all; see
            ``DriveSettings.heading_sigma_deg``).
        true_heading: (n,) the true direction of travel per second, degrees from true
            north in [0, 360) (with ``heading`` only, else None).
    """

    vehicle: str
    path: tuple[int, ...]
    truth: tuple[TruthPoint, ...]
    error_xy: FloatArray
    outlier_xy: FloatArray
    accuracy: FloatArray
    delay: FloatArray
    observed: tuple[int, int] | None = None
    trip_ends: tuple[int, ...] = ()
    speed: FloatArray | None = None
    heading: FloatArray | None = None
    true_heading: FloatArray | None = None


def gauss_markov(
    rng: np.random.Generator,
    n_steps: int,
    sigma: float,
    tau_s: float,
    dt_s: float = 1.0,
    n_series: int = 1,
) -> FloatArray:
    """Sample a first-order Gauss–Markov (AR(1)) process, started in its stationary state.

    ``e[k+1] = phi * e[k] + sqrt(1 - phi**2) * sigma * w[k]`` with ``phi = exp(-dt/tau)``
    and ``w`` standard normal, so every ``e[k]`` has standard deviation ``sigma`` and the
    autocorrelation at lag ``h`` steps is ``phi**h`` (the standard first-order
    Gauss–Markov process). White noise is a poor model of GNSS error: consecutive errors
    are strongly correlated (Ranacher et al., IJGIS 2016), which is what makes a matcher
    that trusts "independent" fixes drift onto a parallel road.

    Args:
        rng: the random generator (the only source of randomness).
        n_steps: number of samples per series.
        sigma: stationary standard deviation, metres.
        tau_s: correlation time constant, seconds (> 0).
        dt_s: sample spacing, seconds.
        n_series: independent series, returned as columns.

    Returns:
        (n_steps, n_series) array.

    >>> gauss_markov(np.random.default_rng(0), 3, 5.0, 30.0).shape
    (3, 1)
    >>> gauss_markov(np.random.default_rng(0), 0, 5.0, 30.0).shape
    (0, 1)
    """
    if tau_s <= 0 or sigma < 0 or dt_s <= 0:
        raise ValueError(f"gauss_markov needs tau_s > 0, sigma >= 0, dt_s > 0; "
                         f"got tau_s={tau_s}, sigma={sigma}, dt_s={dt_s}")
    out = np.zeros((n_steps, n_series))
    if n_steps == 0:
        return out
    phi = math.exp(-dt_s / tau_s)
    w = rng.standard_normal((n_steps, n_series))
    out[0] = sigma * w[0]
    scale = math.sqrt(1.0 - phi * phi) * sigma
    for k in range(1, n_steps):
        out[k] = phi * out[k - 1] + scale * w[k]
    return out


def drivable_segments(network: RoadNetwork) -> BoolArray:
    """Mask of the segments inside the largest strongly connected part of the network.

    A walk restricted to these segments can always go on, and any segment of it can be
    reached from any other. Built with networkx from the network's arrays.

    >>> from livematch.core.geometry import Projection
    >>> net = RoadNetwork(Projection.local(0, 0), np.array([[0.0, 0], [10, 0]]),
    ...     np.array([1, 2]), np.array([0]), np.array([1]), np.array([7]), np.array([0]),
    ...     [{"highway": "residential"}])
    >>> drivable_segments(net).tolist()   # one one-way segment: no cycle, nothing drivable
    [False]
    """
    graph = nx.DiGraph()
    graph.add_nodes_from(range(network.n_vertices))
    graph.add_edges_from(zip(network.seg_from.tolist(), network.seg_to.tolist(), strict=True))
    best: set[int] = set()
    for comp in nx.strongly_connected_components(graph):
        if len(comp) > len(best):
            best = comp
    inside = np.zeros(network.n_vertices, dtype=bool)
    if len(best) > 1:
        inside[list(best)] = True
    return inside[network.seg_from] & inside[network.seg_to]


def _direction(network: RoadNetwork, segment: int) -> tuple[float, float]:
    ax, ay, bx, by = network.segment_coords(segment)
    length = math.hypot(bx - ax, by - ay)
    if length == 0.0:
        return 0.0, 0.0
    return (bx - ax) / length, (by - ay) / length


def random_route(
    network: RoadNetwork,
    rng: np.random.Generator,
    min_length_m: float,
    allowed: BoolArray | None = None,
    straight_bias: float = 2.0,
    revisit_factor: float = 1.0,
) -> list[int]:
    """A connected sequence of directed segments at least ``min_length_m`` long.

    Starts at a uniformly chosen allowed segment; at each vertex picks a leaving allowed
    segment with weight ``exp(straight_bias * cos(turn angle))``, excluding the twin of
    the segment just driven (no U-turns) unless it is the only way on (a dead end).

    With ``revisit_factor < 1`` the weight is further multiplied by
    ``revisit_factor ** n`` where ``n`` is how often the walk has already driven that
    directed segment: a negatively reinforced ("self-avoiding") random walk (the
    "true self-avoiding walk" of Amit, Parisi & Peliti, Phys. Rev. B 1983; from memory).
    It keeps everything the plain walk does (turn preferences, no U-turns, one-ways) and
    only removes repeated laps, so accuracy figures move for that reason alone. The
    usual practice in traffic simulation, trips between random origins and destinations
    routed by shortest or fastest path (e.g. SUMO's random trips; from memory), was
    considered and not chosen: it changes the mix of roads driven (arterials dominate),
    which would move the accuracy for reasons other than the loop artefact. A loop is
    still driven again when it is the only way on (all weights shrink alike).

    Args:
        network: the road network.
        rng: random generator.
        min_length_m: the route stops growing once it is at least this long.
        allowed: segments the walk may use (default: :func:`drivable_segments`).
        straight_bias: preference for going straight (0 = uniform choice).
        revisit_factor: weight factor per earlier pass over a directed segment, in
            (0, 1]; 1 is the plain walk (and draws exactly the same routes).

    Raises:
        BadNetworkError: when no segment is allowed (a network without any cycle).

    Example (a 100 m two-way street is a dead end both ways: the walk turns at its ends):
        >>> from livematch.core.geometry import Projection
        >>> net = RoadNetwork(Projection.local(0, 0), np.array([[0.0, 0], [100, 0]]),
        ...     np.array([1, 2]), np.array([0, 1]), np.array([1, 0]), np.array([7, 7]),
        ...     np.array([0, 0]), [{"highway": "residential"}])
        >>> len(random_route(net, np.random.default_rng(0), 250.0, revisit_factor=0.1))
        3
    """
    if allowed is None:
        allowed = drivable_segments(network)
    candidates = np.flatnonzero(allowed)
    if len(candidates) == 0:
        raise BadNetworkError(
            f"network {network.source!r} has no drivable cycle to simulate on")
    seg = int(candidates[rng.integers(len(candidates))])
    route = [seg]
    length = float(network.seg_len[seg])
    heading = _direction(network, seg)
    driven: dict[int, int] = {seg: 1}
    while length < min_length_m:
        outs = [int(s) for s in network.out_segments(int(network.seg_to[seg])) if allowed[s]]
        forward = [s for s in outs if s != network.seg_twin[seg]] or outs
        weights = np.empty(len(forward))
        for i, s in enumerate(forward):
            dx, dy = _direction(network, s)
            weights[i] = math.exp(straight_bias * (dx * heading[0] + dy * heading[1]))
            if revisit_factor != 1.0:
                weights[i] *= revisit_factor ** driven.get(s, 0)
        seg = forward[int(rng.choice(len(forward), p=weights / weights.sum()))]
        driven[seg] = driven.get(seg, 0) + 1
        route.append(seg)
        length += float(network.seg_len[seg])
        d = _direction(network, seg)
        if d != (0.0, 0.0):
            heading = d
    return route


def travel_times(network: RoadNetwork) -> FloatArray:
    """Free-flow travel time of every segment, seconds.

    A segment's length over the cruise speed of its road class (:data:`ROAD_CLASS_SPEED`,
    :data:`DEFAULT_SPEED` for other classes), the weight trips are routed by.

    >>> from livematch.core.geometry import Projection
    >>> net = RoadNetwork(Projection.local(0, 0), np.array([[0.0, 0], [100, 0]]),
    ...     np.array([1, 2]), np.array([0, 1]), np.array([1, 0]), np.array([7, 7]),
    ...     np.array([0, 0]), [{"highway": "service"}])
    >>> travel_times(net).tolist()   # 100 m at 5 m/s, both ways
    [20.0, 20.0]
    """
    speed = np.array([ROAD_CLASS_SPEED.get(str(r.get("highway", "")), DEFAULT_SPEED)
                      for r in network.roads] or [DEFAULT_SPEED])
    out: FloatArray = network.seg_len / speed[network.seg_road]
    return out


def fastest_path(
    network: RoadNetwork, source: int, target: int, cost: FloatArray, allowed: BoolArray,
    not_first: int = -1,
) -> list[int]:
    """The directed segments of a least-cost path from vertex ``source`` to ``target``.

    Dijkstra's algorithm over the allowed directed segments (so one-way streets are
    respected), each costing ``cost[segment]`` (>= 0; seconds with :func:`travel_times`).
    Ties go to the vertex with the lower index, so the answer is deterministic. A
    least-cost path never drives a segment and then its twin (costs are not negative and
    a turn-round adds a cycle), so a trip turns round only at its ends. ``not_first``
    (a segment index, -1 for none) may not be the first segment of the path; the path
    then never passes ``source`` again either (the least-cost such path).

    Raises:
        BadNetworkError: when ``target`` cannot be reached from ``source``.

    >>> from livematch.core.geometry import Projection
    >>> net = RoadNetwork(Projection.local(0, 0), np.array([[0.0, 0], [100, 0]]),
    ...     np.array([1, 2]), np.array([0, 1]), np.array([1, 0]), np.array([7, 7]),
    ...     np.array([0, 0]), [{"highway": "residential"}])
    >>> ok = np.ones(2, dtype=bool)
    >>> fastest_path(net, 0, 1, net.seg_len, ok), fastest_path(net, 1, 1, net.seg_len, ok)
    ([0], [])
    """
    best = {source: 0.0}
    via: dict[int, int] = {}
    done: set[int] = set()
    heap = [(0.0, source)]
    while heap:
        t, v = heapq.heappop(heap)
        if v in done:
            continue
        if v == target:
            break
        done.add(v)
        for s in network.out_segments(v):
            s = int(s)
            if not allowed[s] or (v == source and s == not_first):
                continue
            w = int(network.seg_to[s])
            tw = t + float(cost[s])
            if w not in done and tw < best.get(w, math.inf):
                best[w] = tw
                via[w] = s
                heapq.heappush(heap, (tw, w))
    else:
        raise BadNetworkError(
            f"network {network.source!r}: vertex {target} cannot be reached from vertex "
            f"{source} over the allowed segments")
    path = []
    v = target
    while v != source:
        s = via[v]
        path.append(s)
        v = int(network.seg_from[s])
    return path[::-1]


def _undirected_degree(network: RoadNetwork) -> npt.NDArray[np.int64]:
    """Number of distinct neighbouring vertices of each vertex, ignoring direction."""
    a = np.concatenate([network.seg_from, network.seg_to]).astype(np.int64)
    b = np.concatenate([network.seg_to, network.seg_from]).astype(np.int64)
    keep = a != b
    pairs = np.unique(a[keep] * network.n_vertices + b[keep])
    out: npt.NDArray[np.int64] = np.bincount(pairs // network.n_vertices,
                                             minlength=network.n_vertices)
    return out


def trip_route(
    network: RoadNetwork,
    rng: np.random.Generator,
    min_length_m: float,
    allowed: BoolArray | None = None,
    trip_min_m: float = 500.0,
    trip_max_m: float = 4000.0,
    turn_round_mid_road: bool = True,
) -> tuple[list[int], list[int]]:
    """A chain of trips, each routed by least travel time, at least ``min_length_m`` long.

    The vehicle starts at the end vertex of a random allowed segment (its last stop).
    Each trip draws a destination: the end vertex of an allowed segment drawn with
    probability proportional to its length (places spread along the streets, like
    addresses), among those ``trip_min_m`` to ``trip_max_m`` metres from the origin in a
    straight line; if there is none (a network smaller than ``trip_min_m``), any other
    vertex. The trip follows :func:`fastest_path` by :func:`travel_times`, so it uses the
    faster roads the way a routed vehicle does. The next trip starts at the destination
    and may leave the way the vehicle came (a turn-round at the stop); within a trip the
    vehicle never turns round.

    Why 0.5-4 km (judgement, not measured): delivery stops and bus legs in a city are a
    few hundred metres to a few kilometres apart; below about 500 m a trip is a block or
    two, mostly the turn-round and the stop, and the straight-line bound does not pin
    the route (in a grid a 4 km trip has many near-fastest routes). On the shipped
    extracts (Helsinki about 1.0 x 1.7 km, test.osm about 2.2 x 2.2 km) the upper bound
    never binds.

    Args:
        network: the road network.
        rng: random generator.
        min_length_m: the route stops growing once it is at least this long (whole trips).
        allowed: segments the trips may use (default: :func:`drivable_segments`, where
            every vertex can reach every other).
        trip_min_m, trip_max_m: straight-line distance of a destination from its origin.
        turn_round_mid_road: if False, a trip leaving a destination that is a plain
            point of a road (joined to exactly two vertices) does not start back the
            way the vehicle came, unless there is no other way to the next destination.

    Returns:
        (route, trip_starts): the directed segments in order, and the indices into the
        route of the first segment of every trip after the first (the vehicle dwells at
        that segment's start vertex).

    Raises:
        BadNetworkError: when no segment is allowed (a network without any cycle).

    Example (a 100 m two-way street: every trip goes to the other end and back):
        >>> from livematch.core.geometry import Projection
        >>> net = RoadNetwork(Projection.local(0, 0), np.array([[0.0, 0], [100, 0]]),
        ...     np.array([1, 2]), np.array([0, 1]), np.array([1, 0]), np.array([7, 7]),
        ...     np.array([0, 0]), [{"highway": "residential"}])
        >>> trip_route(net, np.random.default_rng(0), 250.0)[1]
        [1, 2]
    """
    if allowed is None:
        allowed = drivable_segments(network)
    candidates = np.flatnonzero(allowed)
    if len(candidates) == 0:
        raise BadNetworkError(
            f"network {network.source!r} has no drivable cycle to simulate on")
    cost = travel_times(network)
    lens = network.seg_len[candidates]
    weight = lens / lens.sum() if lens.sum() > 0.0 else np.full(len(lens), 1.0 / len(lens))
    ends = network.seg_to[candidates].astype(np.int64)
    end_xy = network.node_xy[ends]
    here = int(ends[rng.choice(len(candidates), p=weight)])
    degree = _undirected_degree(network)
    route: list[int] = []
    starts: list[int] = []
    length = 0.0
    while length < min_length_m:
        x, y = network.node_xy[here]
        dist = np.hypot(end_xy[:, 0] - x, end_xy[:, 1] - y)
        other = ends != here
        ok = other & (dist >= trip_min_m) & (dist <= trip_max_m)
        if not ok.any():
            ok = other
        p = np.where(ok, weight, 0.0)
        p = p / p.sum() if p.sum() > 0.0 else ok / ok.sum()
        dest = int(ends[rng.choice(len(candidates), p=p)])
        ban = -1
        if route and not turn_round_mid_road and degree[here] == 2:
            ban = int(network.seg_twin[route[-1]])
        try:
            leg = fastest_path(network, here, dest, cost, allowed, ban)
        except BadNetworkError:
            leg = fastest_path(network, here, dest, cost, allowed)
        if route:
            starts.append(len(route))
        route.extend(leg)
        length += float(network.seg_len[leg].sum())
        here = dest
    return route, starts


def _cruise_speed(network: RoadNetwork, segment: int) -> float:
    road = network.roads[int(network.seg_road[segment])]
    return ROAD_CLASS_SPEED.get(str(road.get("highway", "")), DEFAULT_SPEED)


def _speed_limits(
    network: RoadNetwork, route: list[int], rng: np.random.Generator, settings: DriveSettings
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """Per route segment: start position, cruise speed, entry speed limit, stop duration."""
    n = len(route)
    lens = network.seg_len[np.asarray(route, dtype=np.int64)]
    start = np.concatenate([[0.0], np.cumsum(lens)[:-1]])
    factor = rng.uniform(*settings.speed_factor)
    cruise = np.array([_cruise_speed(network, s) * factor for s in route])
    entry = np.full(n, np.inf)
    stop = np.zeros(n)
    stop_draw = rng.random(n)
    stop_len = rng.uniform(settings.stop_min_s, settings.stop_max_s, n)
    heading = _direction(network, route[0])
    for k in range(1, n):
        d = _direction(network, route[k])
        if d == (0.0, 0.0):
            d = heading
        cos_turn = max(-1.0, min(1.0, d[0] * heading[0] + d[1] * heading[1]))
        # Corner speed: cos^2(turn / 2) is 1 straight on, 1/2 at a right angle, 0 for a
        # U-turn; floor 0.2 of cruise (a rule of thumb, common practice).
        corner = max(0.2, (1.0 + cos_turn) / 2.0)
        entry[k] = min(cruise[k - 1], cruise[k]) * corner
        vertex = int(network.seg_from[route[k]])
        prev = route[k - 1]
        choices = [s for s in network.out_segments(vertex) if s != network.seg_twin[prev]]
        if len(choices) >= 2 and stop_draw[k] < settings.stop_p:
            stop[k] = stop_len[k]
        heading = d
    return start, cruise, entry, stop


def simulate_drive(
    network: RoadNetwork,
    rng: np.random.Generator,
    vehicle: str,
    start_time: float,
    settings: DriveSettings = DriveSettings(),
    allowed: BoolArray | None = None,
) -> Drive:
    """Simulate one drive: route, speed profile, 1 Hz truth and the GPS error per second.

    Args:
        network: the road network.
        rng: random generator; the same generator state gives the same drive.
        vehicle: vehicle id written into the drive.
        start_time: epoch seconds of the first observed truth sample (with a lead-in
            the truth starts ``lead_s`` earlier).
        settings: motion and error model.
        allowed: segments the route may use (default :func:`drivable_segments`; pass it
            in when simulating many drives on one network, it costs a graph search).

    Example (a 2 s drive along a 100 m two-way street):
        >>> from livematch.core.geometry import Projection
        >>> net = RoadNetwork(Projection.local(0, 0), np.array([[0.0, 0], [100, 0]]),
        ...     np.array([1, 2]), np.array([0, 1]), np.array([1, 0]), np.array([7, 7]),
        ...     np.array([0, 0]), [{"highway": "residential"}])
        >>> d = simulate_drive(net, np.random.default_rng(1), "v", 0.0,
        ...                    DriveSettings(duration_s=2.0))
        >>> len(d.truth), d.truth[0].offset_m
        (3, 0.0)

    With a lead-in and lead-out the truth is longer than what is observed:
        >>> d = simulate_drive(net, np.random.default_rng(1), "v", 0.0,
        ...                    DriveSettings(duration_s=2.0, lead_s=5.0))
        >>> len(d.truth), d.observed, d.truth[5].t
        (13, (5, 7), 0.0)
    """
    lead = int(settings.lead_s)
    if lead != settings.lead_s:
        raise ValueError(f"DriveSettings.lead_s must be a whole number of seconds, "
                         f"got {settings.lead_s}")
    span = settings.duration_s + 2 * lead
    max_speed = max(ROAD_CLASS_SPEED.values()) * settings.speed_factor[1]
    trip_starts: list[int] = []
    if settings.trips:
        route, trip_starts = trip_route(network, rng, span * max_speed + 100.0, allowed,
                                        settings.trip_min_m, settings.trip_max_m,
                                        settings.turn_round_mid_road)
    else:
        route = random_route(network, rng, span * max_speed + 100.0, allowed,
                             settings.straight_bias, settings.revisit_factor)
    start, cruise, entry, stop = _speed_limits(network, route, rng, settings)
    if trip_starts:
        # The dwell at each destination replaces any junction stop drawn there.
        stop[trip_starts] = rng.uniform(*settings.dwell_s, len(trip_starts))
    total = float(start[-1] + network.seg_len[route[-1]])
    positions = _integrate(start, cruise, entry, stop, total, int(span), settings)
    truth = _truth(network, route, start, positions, start_time - lead)
    n = len(truth)
    error = gauss_markov(rng, n, settings.sigma_m, settings.tau_s, 1.0, 2)
    is_out = rng.random(n) < settings.outlier_p
    dist = rng.uniform(settings.outlier_min_m, settings.outlier_max_m, n)
    angle = rng.uniform(0.0, 2.0 * math.pi, n)
    outlier = np.where(is_out[:, None], np.stack([dist * np.cos(angle),
                                                  dist * np.sin(angle)], axis=1), 0.0)
    # Reported accuracy: the radius holding ~68 % of a 2-D Gaussian error with per-axis
    # sigma is sigma * sqrt(-2 ln 0.32) ~= 1.51 sigma, jittered +-20 % per fix.
    accuracy = np.round(1.51 * settings.sigma_m * rng.uniform(0.8, 1.2, n), 1)
    delay = np.round(rng.uniform(*settings.delay_s, n), 3)
    last = truth[-1].path_index if truth else 0
    observed = None if lead == 0 else (lead, n - 1 - lead)
    speed = None
    if settings.speed_sigma_mps is not None and n:
        # the true speed at each second (central difference of the 1 Hz positions, one
        # side at the ends), plus the receiver's error: drawn last, so nothing above moves
        pos = np.asarray(positions[:n], dtype=float)
        true_v = np.gradient(pos) if n > 1 else np.zeros(1)
        speed = np.round(np.maximum(
            0.0, true_v + rng.normal(0.0, settings.speed_sigma_mps, n)), 2)
    heading = true_heading = None
    if settings.heading_sigma_deg is not None and n:
        # drawn last of all (after the speed's errors), so nothing above moves
        true_heading = _true_heading(network, truth)
        pos = np.asarray(positions[:n], dtype=float)
        true_v = np.gradient(pos) if n > 1 else np.zeros(1)
        slow = np.degrees(np.arctan(HEADING_SPEED_SIGMA_MPS / np.maximum(true_v, 1e-9)))
        sigma = np.sqrt(settings.heading_sigma_deg ** 2 + slow * slow)
        noisy = true_heading + rng.normal(0.0, 1.0, n) * sigma
        wild = rng.random(n) < HEADING_OUTLIER_P
        noisy = np.where(wild, rng.uniform(0.0, 360.0, n), noisy)
        heading = np.where(true_v >= HEADING_MIN_MPS, np.round(noisy % 360.0, 1) % 360.0,
                           np.nan)
    return Drive(vehicle, tuple(route[: last + 1]), truth, error, outlier, accuracy, delay,
                 observed, tuple(k for k in trip_starts if k <= last), speed, heading,
                 true_heading)


def _true_heading(network: RoadNetwork, truth: tuple[TruthPoint, ...]) -> FloatArray:
    """The direction of the segment driven at each truth second, degrees from true north.

    The segment's grid bearing less the grid bearing of true north at the point (the
    meridian convergence, :meth:`~livematch.core.geometry.Projection.north_bearing`).
    """
    segs = np.array([p.segment for p in truth], dtype=np.int64)
    a = network.node_xy[network.seg_from[segs]]
    b = network.node_xy[network.seg_to[segs]]
    grid = np.arctan2(b[:, 0] - a[:, 0], b[:, 1] - a[:, 1])
    north = network.projection.north_bearing([p.x for p in truth], [p.y for p in truth])
    out: FloatArray = np.degrees(grid - north) % 360.0
    return out


def _integrate(
    start: FloatArray, cruise: FloatArray, entry: FloatArray, stop: FloatArray,
    total: float, span_s: int, settings: DriveSettings,
) -> list[float]:
    """Distance along the route at each whole second, by a simple speed controller."""
    n_samples = span_s + 1
    per_sample = round(1.0 / _DT)
    lookahead = 250.0
    s, v, dwell = 0.0, 0.0, 0.0
    k = 0  # current route segment
    nxt = 1  # next constraint (segment start) not yet passed
    out = [0.0]
    step = 0
    while len(out) < n_samples:
        step += 1
        if dwell > 0.0:
            dwell -= _DT
        else:
            while k + 1 < len(start) and start[k + 1] <= s:
                k += 1
            allowed = float(cruise[k])
            j = nxt
            while j < len(start) and start[j] - s < lookahead:
                gap = max(0.0, float(start[j]) - s)
                target = 0.0 if stop[j] > 0.0 else float(entry[j])
                limit = math.sqrt(target * target + 2.0 * settings.decel_mps2 * gap)
                if stop[j] > 0.0:
                    limit = max(1.0, limit)  # creep the last metres instead of never arriving
                allowed = min(allowed, limit)
                if stop[j] > 0.0:
                    break  # nothing beyond a stop matters until the stop is done
                j += 1
            v = min(allowed, v + settings.accel_mps2 * _DT)
            ds = v * _DT
            while nxt < len(start) and start[nxt] <= s + ds:
                if stop[nxt] > 0.0:
                    ds = float(start[nxt]) - s
                    v = 0.0
                    dwell = float(stop[nxt])
                    nxt += 1
                    break
                nxt += 1
            s = min(total, s + ds)
        if step % per_sample == 0:
            out.append(s)
    return out


def _truth(
    network: RoadNetwork, route: list[int], start: FloatArray, positions: list[float],
    start_time: float,
) -> tuple[TruthPoint, ...]:
    points = []
    for i, s in enumerate(positions):
        k = int(np.searchsorted(start, s, side="right")) - 1
        k = min(max(k, 0), len(route) - 1)
        seg = route[k]
        length = float(network.seg_len[seg])
        offset = min(max(s - float(start[k]), 0.0), length)
        ax, ay, bx, by = network.segment_coords(seg)
        f = offset / length if length > 0.0 else 0.0
        points.append(TruthPoint(
            t=start_time + i, x=ax + f * (bx - ax), y=ay + f * (by - ay), segment=seg,
            offset_m=offset, path_index=k, path_pos_m=float(start[k]) + offset,
        ))
    return tuple(points)


def observe(drive: Drive, interval_s: int) -> list[Observation]:
    """The fixes a device reporting every ``interval_s`` seconds would send.

    Samples seconds 0, k, 2k, ... of the observed window of the truth (all of it without
    a lead-in) and adds that second's error and outlier.

    >>> from livematch.core.geometry import Projection
    >>> net = RoadNetwork(Projection.local(0, 0), np.array([[0.0, 0], [100, 0]]),
    ...     np.array([1, 2]), np.array([0, 1]), np.array([1, 0]), np.array([7, 7]),
    ...     np.array([0, 0]), [{"highway": "residential"}])
    >>> d = simulate_drive(net, np.random.default_rng(1), "v", 0.0,
    ...                    DriveSettings(duration_s=10.0))
    >>> [o.t for o in observe(d, 5)]
    [0.0, 5.0, 10.0]
    """
    if interval_s < 1:
        raise ValueError(f"interval_s must be a whole number of seconds >= 1, got {interval_s}")
    first, last = drive.observed or (0, len(drive.truth) - 1)
    out = []
    for i in range(first, last + 1, interval_s):
        p = drive.truth[i]
        ex, ey = drive.error_xy[i] + drive.outlier_xy[i]
        out.append(Observation(
            t=p.t, x=p.x + float(ex), y=p.y + float(ey), accuracy=float(drive.accuracy[i]),
            outlier=bool(np.any(drive.outlier_xy[i] != 0.0)), truth_index=i,
            delay_s=float(drive.delay[i]),
            speed=None if drive.speed is None else float(drive.speed[i]),
            heading=(None if drive.heading is None or math.isnan(drive.heading[i])
                     else float(drive.heading[i])),
        ))
    return out
