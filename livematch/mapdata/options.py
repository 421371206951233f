"""What a map import keeps (:class:`ImportOptions`) and what it saw (:class:`ImportStats`).

Both are plain dataclasses so that they can be written into the compiled network file as
JSON and shown by ``livematch network info``.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

from livematch.errors import BadNetworkError

#: Highway classes a motor vehicle may drive on, kept by default (OpenStreetMap
#: ``highway=*`` values; see https://wiki.openstreetmap.org/wiki/Key:highway).
DEFAULT_HIGHWAYS: tuple[str, ...] = (
    "motorway", "motorway_link",
    "trunk", "trunk_link",
    "primary", "primary_link",
    "secondary", "secondary_link",
    "tertiary", "tertiary_link",
    "unclassified", "residential", "living_street", "service", "road",
)

PROJECTION_KINDS = ("local", "utm")

#: The transport modes an import can build the network for (OpenStreetMap's access
#: keys, https://wiki.openstreetmap.org/wiki/Key:access): ``motor_vehicle``, any motor
#: vehicle (delivery vans, cars, and buses on the roads everyone drives); ``bus``, a bus
#: in public service, which may also take ways open to buses only (bus terminals, bus
#: gates, ``highway=busway``) and their contraflow lanes.
TRANSPORT_MODES = ("motor_vehicle", "bus")

#: Highway classes only a bus may use, kept in addition for the ``bus`` mode.
BUS_HIGHWAYS: tuple[str, ...] = ("busway", "bus_guideway")


@dataclass(frozen=True)
class ImportOptions:
    """Which roads an import keeps and which projection it uses.

    Args:
        highways: OpenStreetMap ``highway`` values to keep (OSM sources only; every
            feature of a GeoJSON source is a road).
        include_service: keep ``highway=service`` (driveways, parking aisles...) when it is
            in ``highways``; False drops it without editing the class list.
        projection: ``"local"`` (azimuthal equidistant about the bounding-box centre) or
            ``"utm"`` (the UTM zone of that centre).
        epsg: an EPSG code that wins over ``projection`` (it must be in metres).
        merge_coincident: merge directed segments that join the same two vertices (a
            road drawn twice over the same nodes) into one, reporting the way of the more
            important road class (:func:`livematch.core.network.merge_coincident`).
            On by default; False keeps the map as drawn (for comparisons).
        transport_mode: whose roads (:data:`TRANSPORT_MODES`): ``motor_vehicle`` (the
            default) or ``bus``, which also keeps :data:`BUS_HIGHWAYS` and reads the bus
            access and one-way keys first (:mod:`livematch.mapdata.osm`). One network
            serves one mode: a mixed fleet runs a daemon (or worker group) per mode.

    Example:
        >>> "service" in ImportOptions(include_service=False).kept_highways()
        False
        >>> ImportOptions(highways=("service",), include_service=False).kept_highways()
        frozenset()
        >>> sorted(ImportOptions(highways=("primary",), transport_mode="bus").kept_highways())
        ['bus_guideway', 'busway', 'primary']
    """

    highways: tuple[str, ...] = DEFAULT_HIGHWAYS
    include_service: bool = True
    projection: str = "local"
    epsg: int | None = None
    merge_coincident: bool = True
    transport_mode: str = "motor_vehicle"

    def __post_init__(self) -> None:
        if self.transport_mode not in TRANSPORT_MODES:
            raise BadNetworkError(f"unknown transport mode {self.transport_mode!r}; use "
                                  + " or ".join(repr(m) for m in TRANSPORT_MODES))
        if self.projection not in PROJECTION_KINDS:
            raise BadNetworkError(
                f"unknown projection kind {self.projection!r}; use 'local' or 'utm'"
            )
        if isinstance(self.highways, str):  # a lone string would iterate by letter
            raise BadNetworkError(f"highways must be a sequence of classes, got {self.highways!r}")
        object.__setattr__(self, "highways", tuple(self.highways))

    def kept_highways(self) -> frozenset[str]:
        """The highway classes actually kept.

        ``highways``, with the bus-only classes for the ``bus`` mode, minus ``service``
        when excluded.
        """
        kept = set(self.highways)
        if self.transport_mode == "bus":
            kept.update(BUS_HIGHWAYS)
        if not self.include_service:
            kept.discard("service")
        return frozenset(kept)

    def to_json(self) -> dict[str, Any]:
        """A JSON-ready dict of the options."""
        out = asdict(self)
        out["highways"] = list(self.highways)
        return out

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> ImportOptions:
        """Inverse of :meth:`to_json`."""
        return cls(
            highways=tuple(data.get("highways", DEFAULT_HIGHWAYS)),
            include_service=bool(data.get("include_service", True)),
            projection=str(data.get("projection", "local")),
            epsg=data.get("epsg"),
            # files written before the option existed: their networks are merged on load
            # (see livematch.mapdata.netfile), so the default describes them too
            merge_coincident=bool(data.get("merge_coincident", True)),
            # files written before the option existed were built for motor vehicles
            transport_mode=str(data.get("transport_mode", "motor_vehicle")),
        )


@dataclass
class ImportStats:
    """Counts an import gathered, reported by ``network build`` and ``network info``.

    Attributes:
        source_format: ``"osm"`` or ``"geojson"``.
        ways_seen: OSM ways with a ``highway`` tag, or GeoJSON features.
        ways_kept: ways/features that gave at least one segment.
        excluded_class: ways whose highway class is not kept.
        excluded_access: ways closed to the import's transport mode (see
            :mod:`livematch.mapdata.osm`).
        ways_clipped: kept ways that referenced nodes missing from the file (typical of
            extracts cut at a bounding box); only their parts between present nodes are kept.
        missing_node_refs: number of such missing node references.
        degenerate: ways/features with fewer than two distinct points (no segment).
        coincident_merged: directed segments dropped because another segment joins the
            same two vertices in the same direction (a road drawn twice; see
            :attr:`ImportOptions.merge_coincident`).
        coincident_pairs: ordered vertex pairs that had such duplicates.
    """

    source_format: str
    ways_seen: int = 0
    ways_kept: int = 0
    excluded_class: int = 0
    excluded_access: int = 0
    ways_clipped: int = 0
    missing_node_refs: int = 0
    degenerate: int = 0
    coincident_merged: int = 0
    coincident_pairs: int = 0
    notes: list[str] = field(default_factory=list)

    def to_json(self) -> dict[str, Any]:
        """A JSON-ready dict of the counts."""
        return asdict(self)

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> ImportStats:
        """Inverse of :meth:`to_json` (unknown keys are ignored)."""
        known = {k: data[k] for k in cls.__dataclass_fields__ if k in data}
        return cls(**known)
