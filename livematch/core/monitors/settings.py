"""Settings of the alert monitors (route, off-network, geofences, staleness).

The shell maps an ``[alerts]`` section of the TOML configuration onto
:class:`AlertSettings` key by key; :meth:`AlertSettings.problems` lists what is wrong in
terms of those keys, as :class:`~livematch.core.settings.MatchSettings` does.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields

#: Where a geofence looks for the vehicle: the raw fix or the matched point on the road.
FENCE_POSITIONS = ("raw", "matched")


@dataclass(frozen=True, slots=True, kw_only=True)
class AlertSettings:
    """When each alert fires and ends. Units: metres, seconds.

    Attributes:
        eps_route_m: the route monitor's Fréchet threshold: the recent fixes are on route
            while some sub-curve of the route lies within this distance of them. 40 m sits
            above consumer GNSS error in a city (sigma ~5 m per axis, urban multipath up to
            ~20 m) plus the offset of a centre-line route from the lane actually driven,
            and below the spacing of parallel streets one block apart (~80-120 m), so a
            detour onto the next street is still seen (rule of thumb, common practice).
        off_route_s, off_route_m: off-route is declared only when the fixes have stayed
            farther than ``eps_route_m`` from the route for ``off_route_s`` seconds (from
            the first such fix) *and* the vehicle has got at least ``off_route_m`` away
            from where it was last on route (or is at least 2 x ``eps_route_m`` from the
            route). 10 s outlasts the short bursts of multipath and outliers (a few
            seconds, common practice) while keeping detection within seconds; the
            distance keeps a vehicle standing beside the route, its fixes jittering
            across the threshold, from ever alerting, while one stopped well away from
            the route still does.
        on_route_fixes: back on route after this many consecutive fixes lie within
            ``eps_route_m`` of the route again (and not against its direction).
        wrong_way_m: wrong direction is declared once the fixes have followed the route
            backwards for this many metres while the forward sweep could not follow them.
            It must exceed 2 x ``eps_route_m``: a vehicle standing still, jittering,
            never moves backwards that far.
        off_network_s: off-network when no road lies within the matcher's off-network
            radius (``matcher.off_network_m``; by default its largest eps) of the fixes
            for this long (from the first such fix).
        on_network_fixes: back on the network after this many consecutive fixes with a
            road nearby.
        fence_inner_m, fence_outer_m: a vehicle enters a fence only once it is this far
            inside the polygon, and leaves it only once it is this far outside, so fixes
            jittering across the boundary do not flap. 15 m is three times the per-axis
            GNSS sigma of a good receiver (rule of thumb, common practice). When the
            inner margin would leave nothing of a small polygon, the polygon itself is
            used for entering.
        fence_fixes: consecutive fixes needed on the far side of a margin before the
            state changes (2: a single outlier never flips a fence).
        fence_dwell_s: default dwell time: a ``fence_dwell`` alert fires once a vehicle
            has been inside a fence this long (a fence may set its own ``dwell_s``).
        fence_position: ``"raw"`` (the fix as received, after the matcher's filters) or
            ``"matched"`` (the live assignment on the road; the raw fix when there is no
            road nearby). Raw is the default: fences are areas (depots, zones), not roads.
        stale_s: a known vehicle from which no fix arrived for this long (receive time)
            is stale. 120 s is four missed reports at a 30 s interval (common practice
            for fleet feeds reporting every 1-30 s).
    """

    eps_route_m: float = 40.0
    off_route_s: float = 10.0
    off_route_m: float = 50.0
    on_route_fixes: int = 5
    wrong_way_m: float = 100.0
    off_network_s: float = 30.0
    on_network_fixes: int = 3
    fence_inner_m: float = 15.0
    fence_outer_m: float = 15.0
    fence_fixes: int = 2
    fence_dwell_s: float = 600.0
    fence_position: str = "raw"
    stale_s: float = 120.0

    def problems(self) -> list[tuple[str, str]]:
        """Every invalid value as (key, what was expected, with the value found).

        >>> AlertSettings().problems()
        []
        >>> AlertSettings(eps_route_m=-1.0, fence_position="gps").problems()[0]
        ('eps_route_m', 'must be a positive number, got -1.0')
        """
        out: list[tuple[str, str]] = []
        for name in ("eps_route_m", "off_route_s", "wrong_way_m", "off_network_s",
                     "fence_dwell_s", "stale_s"):
            value = getattr(self, name)
            if not _number(value) or value <= 0:
                out.append((name, f"must be a positive number, got {value!r}"))
        for name in ("off_route_m", "fence_inner_m", "fence_outer_m"):
            value = getattr(self, name)
            if not _number(value) or value < 0:
                out.append((name, f"must be a number >= 0, got {value!r}"))
        for name in ("on_route_fixes", "on_network_fixes", "fence_fixes"):
            value = getattr(self, name)
            if not (isinstance(value, int) and not isinstance(value, bool) and value >= 1):
                out.append((name, f"must be an integer >= 1, got {value!r}"))
        if (_number(self.wrong_way_m) and _number(self.eps_route_m)
                and self.wrong_way_m <= 2.0 * self.eps_route_m):
            out.append(("wrong_way_m", f"must exceed 2 x eps_route_m "
                                       f"({2.0 * self.eps_route_m!r}), got {self.wrong_way_m!r}"))
        if self.fence_position not in FENCE_POSITIONS:
            out.append(("fence_position", f"must be one of {', '.join(FENCE_POSITIONS)}, "
                                          f"got {self.fence_position!r}"))
        return out

    @classmethod
    def keys(cls) -> tuple[str, ...]:
        """The configuration keys this section accepts."""
        return tuple(f.name for f in fields(cls))


def _number(value: object) -> bool:
    return (isinstance(value, int | float) and not isinstance(value, bool)
            and math.isfinite(value))
