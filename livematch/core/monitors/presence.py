"""Presence alerts: off the road network, and silent (stale) vehicles.

* :class:`OffNetworkMonitor`: fed with every fix the matcher accepted and whether the
  matcher found a road within its off-network radius (an assignment, or a
  ``road_beyond_eps`` verdict: a road beyond the ladder but within
  ``matcher.off_network_m``) or not (its ``no_road_nearby`` verdict). ``off_network``
  fires once the fixes have had no road nearby for ``off_network_s`` seconds (from the
  first such fix); ``on_network`` once ``on_network_fixes`` consecutive fixes have a road
  again.
* :class:`StaleWatch`: the core has no clock, so staleness is judged against a time the
  shell passes in: the *receive* time of each message (``at``) and the receive time
  ``now`` of a :meth:`StaleWatch.check`. Both come from the receiver's clock, so a
  device whose own clock is off by hours is not stale for that. ``stale`` fires once no
  fix arrived for ``stale_s`` seconds; ``fresh`` with the next fix.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from livematch.core.events import Alert
from livematch.core.fix import Fix
from livematch.core.monitors.settings import AlertSettings


@dataclass(slots=True)  # one per vehicle: no instance dict
class OffNetworkMonitor:
    """One vehicle's off-network state.

    Example (no road for 30 s, then three fixes on a road):
        >>> m = OffNetworkMonitor()
        >>> s = AlertSettings()
        >>> [a.alert_kind for k in range(31) for a in m.update(Fix("v", k, 0, 0, 0, 0),
        ...  False, s)]
        ['off_network']
        >>> [a.alert_kind for k in range(31, 34) for a in m.update(Fix("v", k, 0, 0, 0, 0),
        ...  True, s)]
        ['on_network']
    """

    off: bool = False
    since: float | None = None  # first fix of the current run without a road nearby
    back: int = 0  # consecutive fixes with a road, while off
    # time, lat, lon of the last fix with a road (``on``: there was one), as three
    # fields rather than a tuple: unboxed doubles in the compiled build, where the tuple
    # and its three float objects were 136 bytes a vehicle, built again on every fix
    # (bench/memory.py step 6); read together as :attr:`last_on`
    on: bool = False
    on_t: float = 0.0
    on_lat: float = 0.0
    on_lon: float = 0.0

    @property
    def last_on(self) -> tuple[float, float, float] | None:
        """Time, lat, lon of the last fix with a road nearby, None before the first."""
        return (self.on_t, self.on_lat, self.on_lon) if self.on else None

    def on_road(self, fix: Fix) -> None:
        """Keep ``fix`` as the last fix with a road nearby."""
        self.on = True
        self.on_t = fix.t
        self.on_lat = fix.lat
        self.on_lon = fix.lon

    def update(self, fix: Fix, has_road: bool, settings: AlertSettings) -> list[Alert]:
        """Take one accepted fix; ``has_road``: the matcher found a road near it."""
        if has_road:
            if not self.off:
                self.since = None
                self.on_road(fix)
                return []
            self.back += 1
            if self.back < settings.on_network_fixes:
                return []
            since = self.since if self.since is not None else fix.t
            self.off, self.back, self.since = False, 0, None
            self.on_road(fix)
            return [Alert(fix.vehicle, fix.t, "on_network", {
                "duration_s": round(fix.t - since, 1), "lat": fix.lat, "lon": fix.lon})]
        self.back = 0
        if self.since is None:
            self.since = fix.t
        if self.off or fix.t - self.since < settings.off_network_s:
            return []
        self.off = True
        last = self.last_on
        return [Alert(fix.vehicle, fix.t, "off_network", {
            "since": self.since, "duration_s": round(fix.t - self.since, 1),
            "lat": fix.lat, "lon": fix.lon,
            "last_on_network_time": last[0] if last else None,
            "last_on_network_lat": last[1] if last else None,
            "last_on_network_lon": last[2] if last else None})]

    def to_state(self) -> dict[str, Any]:
        """JSON-ready state (``last_on`` a list, as it always was)."""
        return {"off": self.off, "since": self.since, "back": self.back,
                "last_on": [self.on_t, self.on_lat, self.on_lon] if self.on else None}

    @classmethod
    def from_state(cls, state: dict[str, Any]) -> OffNetworkMonitor:
        """Restore a monitor written by :meth:`to_state`."""
        m = cls(off=state["off"], since=state["since"], back=state["back"])
        last = state["last_on"]
        if last is not None:
            m.on = True
            m.on_t, m.on_lat, m.on_lon = last
        return m


@dataclass(slots=True)  # one per vehicle: no instance dict
class StaleWatch:
    """One vehicle's last sign of life and whether it is stale.

    Attributes:
        at: receive time of its newest fix (epoch s, the receiver's clock).
        t, lat, lon: time and position of that fix.
        stale: a ``stale`` alert was sent and no fix has arrived since.

    Example (120 s of silence, then a fix):
        >>> w = StaleWatch(at=100.0, t=99.0, lat=60.0, lon=24.0)
        >>> w.check("v", 219.0, AlertSettings()), w.check("v", 221.0, AlertSettings())[0].facts
        ([], {'last_fix_time': 99.0, 'silent_s': 121.0, 'lat': 60.0, 'lon': 24.0})
        >>> w.seen(Fix("v", 300.0, 24.0, 60.0, 0, 0), 301.0)[0].alert_kind
        'fresh'
    """

    at: float
    t: float
    lat: float
    lon: float
    stale: bool = False

    def seen(self, fix: Fix, at: float) -> list[Alert]:
        """A fix of this vehicle arrived at receive time ``at``; ``fresh`` if it was stale."""
        out: list[Alert] = []
        if self.stale:
            out.append(Alert(fix.vehicle, fix.t, "fresh", {
                "silent_s": round(at - self.at, 1), "last_fix_time": self.t,
                "lat": fix.lat, "lon": fix.lon}))
        if at >= self.at:
            self.at = at
        if fix.t >= self.t:
            self.t, self.lat, self.lon = fix.t, fix.lat, fix.lon
        self.stale = False
        return out

    def due(self, settings: AlertSettings) -> float:
        """Receive time after which this vehicle is stale (inf when it already is)."""
        return float("inf") if self.stale else self.at + settings.stale_s

    def check(self, vehicle: str, now: float, settings: AlertSettings) -> list[Alert]:
        """At receive time ``now``: a ``stale`` alert if silent for more than ``stale_s``."""
        if self.stale or now - self.at <= settings.stale_s:
            return []
        self.stale = True
        return [Alert(vehicle, now, "stale", {
            "last_fix_time": self.t, "silent_s": round(now - self.at, 1),
            "lat": self.lat, "lon": self.lon})]

    def to_state(self) -> dict[str, Any]:
        """JSON-ready state (``dataclasses.asdict``'s dict, built without its deep copy)."""
        return {"at": self.at, "t": self.t, "lat": self.lat, "lon": self.lon,
                "stale": self.stale}

    @classmethod
    def from_state(cls, state: dict[str, Any]) -> StaleWatch:
        """Restore a watch written by :meth:`to_state`."""
        return cls(**state)
