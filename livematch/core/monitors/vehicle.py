"""Every alert monitor of one vehicle, fed from the matcher's verdict on each fix.

:class:`VehicleAlerts` bundles the route monitor (when the vehicle has a known route),
the geofence monitor, the off-network monitor and the stale watch, and serialises them
together into the vehicle's checkpoint so a restored vehicle goes on exactly as before.
It takes the route and fences as arguments instead of holding the fleet-wide data.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from typing import Any, Final

from livematch.core.events import Alert
from livematch.core.fix import Fix
from livematch.core.monitors.fences import FenceMonitor, FenceSet
from livematch.core.monitors.presence import OffNetworkMonitor, StaleWatch
from livematch.core.monitors.route import RouteChain, RouteMonitor
from livematch.core.monitors.settings import AlertSettings

STATE_VERSION: Final = 1
#: A vehicle that moved less than this (squared metres, 8 m) since its last fence probe
#: gets the probe's clearance measured (``FenceSet.probe_clear``), so that its next fixes
#: can skip the probe; a faster one would rarely stay within it (the clearances of the
#: probes of ``bench/ab.py --what pipeline``'s drives: median 3.4 m, a throwaway
#: count). A choice of cost only: the answers are the same either way.
_SLOW_M2: Final = 64.0


class VehicleAlerts:
    """One vehicle's monitors.

    Attributes:
        route: the route monitor, None while the vehicle has no known route.
        requested: the route id last asked for (known or not), None for none.
        fences: geofence state; None while the vehicle is in no fence and about to
            enter none (most vehicles, most of the time: no object held for them).
        network: off-network state.
        watch: last sign of life (None before the first fix).

    Example (degenerate: a vehicle without route or fences, one fix on a road):
        >>> a = VehicleAlerts()
        >>> a.update(Fix("v", 0.0, 24.0, 60.0, 0.0, 0.0), None, True, None, (),
        ...          AlertSettings())
        []
    """

    __slots__ = ("fence_memo", "fences", "network", "requested", "route", "watch")

    #: ``(fence set, x, y, r2, probe)``: the last fence probe, at (x, y), and the squared
    #: metres a point may be from there and get the same answer
    #: (:meth:`~livematch.core.monitors.fences.FenceSet.probe_clear`; 0 when unknown);
    #: None while no fence is near.
    #: Not part of the checkpoint: a restored vehicle probes afresh, with the same answer.
    fence_memo: tuple[FenceSet, float, float, float, tuple[list[int], list[bool]]] | None

    def __init__(self) -> None:
        self.route: RouteMonitor | None = None
        self.requested: str | None = None
        self.fences: FenceMonitor | None = None
        self.network = OffNetworkMonitor()
        self.watch: StaleWatch | None = None
        self.fence_memo = None

    def set_route(self, route_id: str | None, chain: RouteChain | None,
                  settings: AlertSettings) -> bool:
        """Follow ``route_id`` (``chain`` None: unknown or no route); True if it changed.

        A change starts the route monitor afresh (no alert is sent for the change; an open
        off-route episode of the old route simply ends).
        """
        if route_id == self.requested and (self.route is None) == (chain is None):
            return False
        self.requested = route_id
        self.route = RouteMonitor(route_id, chain, settings) if (
            chain is not None and route_id is not None) else None
        return True

    def update(self, fix: Fix, matched: tuple[float, float] | None, has_road: bool,
               fences: FenceSet | None, groups: Iterable[str],
               settings: AlertSettings) -> list[Alert]:
        """Take one fix the matcher accepted; return its alerts in a fixed order.

        Args:
            fix: the fix.
            matched: the matched point (metres) of its assignment, None without one.
            has_road: the matcher found a road within its off-network radius (its
                largest eps, or ``MatchSettings.off_network_m``).
            fences: the fleet's fences, if any.
            groups: the vehicle's group names (for fence filters).
            settings: the alert settings.
        """
        network = self.network
        if has_road and not network.off:
            # on a road and not off the network: OffNetworkMonitor.update's first case,
            # inline (it runs for nearly every fix of every vehicle)
            network.since = None
            network.on = True
            network.on_t = fix.t
            network.on_lat = fix.lat
            network.on_lon = fix.lon
            alerts: list[Alert] = []
        else:
            alerts = network.update(fix, has_road, settings)
        if self.route is not None:
            alerts.extend(self.route.update(fix))
        if fences is not None:
            x, y = (matched if matched is not None and settings.fence_position == "matched"
                    else (fix.x, fix.y))
            monitor = self.fences
            memo = self.fence_memo
            moved2 = math.inf
            hit = False
            if memo is not None and memo[0] is fences:
                moved2 = (x - memo[1]) * (x - memo[1]) + (y - memo[2]) * (y - memo[2])
                if moved2 < memo[3]:
                    near = memo[4]  # nearer to the last probed point than any fence's edge
                    hit = True
            if not hit:
                if monitor is None and not fences.may_be_near(x, y):
                    self.fence_memo = None
                    return alerts  # no fence can hold the point: no compiled probe
                # the clearance is measured only for a vehicle that moved little since
                # the last probe (one likely to stay within it)
                if moved2 < _SLOW_M2:
                    near, r2 = fences.probe_clear(x, y)
                else:
                    near = fences.probe(x, y)
                    r2 = 0.0
                self.fence_memo = (fences, x, y, r2, near)
            if monitor is None:
                if True not in near[1]:
                    # in no fence and in no inner polygon: a fresh monitor would neither
                    # alert nor keep anything (FenceMonitor.update)
                    return alerts
                monitor = FenceMonitor()
            alerts.extend(monitor.update(fences, fix, x, y, groups, near))
            # a monitor with no state is a fresh one: none is kept until it has some
            self.fences = monitor if monitor.state else None
        return alerts

    def seen(self, fix: Fix, at: float) -> list[Alert]:
        """A decoded fix arrived at receive time ``at`` (a sign of life)."""
        if self.watch is None:
            self.watch = StaleWatch(at, fix.t, fix.lat, fix.lon)
            return []
        return self.watch.seen(fix, at)

    def to_state(self) -> dict[str, Any]:
        """JSON-ready state of every monitor (route geometry excluded)."""
        return {
            "v": STATE_VERSION,
            "requested": self.requested,
            "route": self.route.to_state() if self.route is not None else None,
            "fences": self.fences.to_state() if self.fences is not None else {},
            "network": self.network.to_state(),
            "watch": self.watch.to_state() if self.watch is not None else None,
        }

    @classmethod
    def from_state(cls, state: dict[str, Any], chain_of: Callable[[str], RouteChain | None],
                   settings: AlertSettings) -> VehicleAlerts:
        """Restore from :meth:`to_state`; ``chain_of`` gives a route id's chain (or None).

        A route that is no longer loaded leaves the vehicle without a route monitor.
        """
        if state.get("v") != STATE_VERSION:
            raise ValueError(f"alert state version {state.get('v')!r}, "
                             f"expected {STATE_VERSION}")
        a = cls()
        a.requested = state["requested"]
        route = state["route"]
        if route is not None:
            chain = chain_of(route["route"])
            if chain is not None:
                a.route = RouteMonitor.from_state(route, chain, settings)
        a.fences = FenceMonitor.from_state(state["fences"]) if state["fences"] else None
        a.network = OffNetworkMonitor.from_state(state["network"])
        a.watch = StaleWatch.from_state(state["watch"]) if state["watch"] else None
        return a
