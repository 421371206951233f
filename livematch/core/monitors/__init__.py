"""Alert monitors fed by the matcher: route adherence, geofences, off-network, staleness.

* :mod:`~livematch.core.monitors.settings`: :class:`AlertSettings` (the ``[alerts]``
  configuration section).
* :mod:`~livematch.core.monitors.route`: :class:`Route`, :class:`RouteChain`,
  :class:`RouteMonitor` (off_route, on_route, wrong_direction; progress along the route).
* :mod:`~livematch.core.monitors.fences`: :class:`Fence`, :class:`FenceSet`,
  :class:`FenceMonitor` (fence_enter, fence_exit, fence_dwell).
* :mod:`~livematch.core.monitors.presence`: :class:`OffNetworkMonitor` (off_network,
  on_network) and :class:`StaleWatch` (stale, fresh).
* :mod:`~livematch.core.monitors.vehicle`: :class:`VehicleAlerts`, one vehicle's set.

Pure like the rest of the core: the fixes' times and the times the shell passes in are
the only clocks.
"""

from __future__ import annotations

from livematch.core.monitors.fences import Fence, FenceMonitor, FenceSet
from livematch.core.monitors.presence import OffNetworkMonitor, StaleWatch
from livematch.core.monitors.route import Route, RouteChain, RouteMonitor
from livematch.core.monitors.settings import AlertSettings
from livematch.core.monitors.vehicle import VehicleAlerts

#: Every alert kind, as published in the ``kind`` field of alert records.
ALERT_KINDS = ("off_route", "on_route", "wrong_direction", "off_network", "on_network",
               "fence_enter", "fence_exit", "fence_dwell", "stale", "fresh")

__all__ = [
    "ALERT_KINDS",
    "AlertSettings",
    "Fence",
    "FenceMonitor",
    "FenceSet",
    "OffNetworkMonitor",
    "Route",
    "RouteChain",
    "RouteMonitor",
    "StaleWatch",
    "VehicleAlerts",
]
