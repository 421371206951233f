"""Import the drivable roads of an OpenStreetMap file (PBF or XML) as a :class:`RoadNetwork`.

Reading uses the ``osmium`` package (libosmium) in two streaming passes: the ways with a
``highway`` tag first, then only the nodes those ways need. Anything osmium reads works:
``.osm.pbf``, ``.osm``, ``.osm.bz2``, ``.osm.gz``, ``.o5m``, ``.opl``.

Rules, each a pure function of a way's tags so that they can be checked alone:

* **Class.** A way is kept when its ``highway`` value is in
  :attr:`ImportOptions.highways` (default :data:`DEFAULT_HIGHWAYS`); ``service`` can be
  dropped with ``include_service=False``.
* **Access** (:func:`closed_to`). The most specific of ``motor_vehicle``,
  ``vehicle``, ``access`` that the way carries decides: the way is left out when that
  value is ``no`` or ``private``; any other value (``yes``, ``designated``,
  ``destination``, ``permissive``...) keeps it. So ``access=no`` +
  ``motor_vehicle=yes`` is kept, ``vehicle=no`` alone is dropped, ``access=private`` +
  ``motor_vehicle=destination`` is kept. For the ``bus`` transport mode
  (:attr:`ImportOptions.transport_mode`) ``bus`` and then ``psv`` come first: a bus
  gate or terminal (``access=no`` + ``psv=yes``) is kept, and ``highway=busway`` /
  ``bus_guideway`` are kept classes.
* **Direction** (:func:`travel_direction`). ``oneway=yes|1|true`` forward only;
  ``oneway=-1|reverse`` backward only; ``oneway=no|0|false`` both; ``reversible`` and
  ``alternating`` both (each direction is legal at some time). Without a recognised
  ``oneway`` value, ``junction=roundabout|circular`` and ``highway=motorway|motorway_link``
  are forward only, everything else both ways. For a bus ``oneway:bus``, then
  ``oneway:psv``, win over ``oneway`` (contraflow bus lanes).
* **Shape.** Every node of a way is a vertex; a repeated consecutive node reference is
  skipped. A node that the file does not contain (extracts cut at a bounding box keep
  ways whose nodes lie outside) splits the way there: the runs of present nodes are kept,
  the steps to and from the missing node are not. Such ways and missing references are
  counted in :class:`ImportStats`.

Each directed segment keeps ``(way, from_node, to_node)`` OSM ids; ``roads`` holds one
``{"name", "ref", "highway"}`` dict per kept way. Vertices exist only for nodes that kept
ways use, ordered by node id.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import osmium

from livematch.core.network import RoadNetwork
from livematch.errors import BadNetworkError
from livematch.mapdata.build import (
    BACKWARD,
    BOTH,
    FORWARD,
    Chain,
    assemble,
    drop_consecutive_repeats,
)
from livematch.mapdata.options import DEFAULT_HIGHWAYS, ImportOptions, ImportStats

__all__ = [
    "DEFAULT_HIGHWAYS",
    "ImportOptions",
    "ImportStats",
    "closed_to",
    "read_osm",
    "travel_direction",
]

_ONEWAY_FORWARD = frozenset({"yes", "1", "true"})
_ONEWAY_BACKWARD = frozenset({"-1", "reverse"})
_ONEWAY_BOTH = frozenset({"no", "0", "false", "reversible", "alternating"})
_IMPLIED_ONEWAY_HIGHWAYS = frozenset({"motorway", "motorway_link"})
_IMPLIED_ONEWAY_JUNCTIONS = frozenset({"roundabout", "circular"})
# Access and one-way keys per transport mode, most specific first (the access
# hierarchy access > vehicle > motor_vehicle > psv > bus of the OpenStreetMap wiki's
# Key:access page, and its oneway:bus / oneway:psv one-way exceptions; from memory).
_ACCESS_KEYS = {"motor_vehicle": ("motor_vehicle", "vehicle", "access"),
                "bus": ("bus", "psv", "motor_vehicle", "vehicle", "access")}
_ONEWAY_KEYS = {"motor_vehicle": ("oneway",), "bus": ("oneway:bus", "oneway:psv", "oneway")}
_CLOSED_VALUES = frozenset({"no", "private"})


def travel_direction(tags: Mapping[str, str], mode: str = "motor_vehicle") -> int:
    """Which way traffic of ``mode`` (``motor_vehicle`` or ``bus``) may go along a way.

    The most specific one-way key the way carries decides: for a bus ``oneway:bus``,
    then ``oneway:psv``, then ``oneway`` (a bus lane against a one-way street:
    ``oneway=yes`` + ``oneway:bus=no``).

    Returns :data:`~livematch.mapdata.build.FORWARD` (drawing order),
    :data:`~livematch.mapdata.build.BACKWARD` or :data:`~livematch.mapdata.build.BOTH`.

    >>> travel_direction({"highway": "residential"})
    0
    >>> travel_direction({"highway": "primary", "oneway": "-1"})
    -1
    >>> travel_direction({"highway": "primary", "junction": "roundabout"})
    1
    >>> travel_direction({"highway": "motorway", "oneway": "no"})
    0
    >>> street = {"highway": "residential", "oneway": "yes", "oneway:bus": "no"}
    >>> travel_direction(street), travel_direction(street, "bus")
    (1, 0)
    """
    oneway = next((tags[k] for k in _ONEWAY_KEYS[mode] if k in tags), None)
    if oneway in _ONEWAY_FORWARD:
        return FORWARD
    if oneway in _ONEWAY_BACKWARD:
        return BACKWARD
    if oneway in _ONEWAY_BOTH:
        return BOTH
    if (tags.get("junction") in _IMPLIED_ONEWAY_JUNCTIONS
            or tags.get("highway") in _IMPLIED_ONEWAY_HIGHWAYS):
        return FORWARD
    return BOTH


def closed_to(tags: Mapping[str, str], mode: str = "motor_vehicle") -> bool:
    """Whether a way is closed to ``mode`` (``motor_vehicle`` or ``bus``).

    True when the most specific access tag of the mode present says ``no`` or
    ``private`` (for a bus: ``bus``, ``psv``, then the motor vehicle keys).

    >>> closed_to({"access": "no", "motor_vehicle": "yes"})
    False
    >>> closed_to({"vehicle": "no"})
    True
    >>> closed_to({})
    False
    >>> gate = {"highway": "service", "access": "no", "psv": "yes"}   # a bus gate
    >>> closed_to(gate), closed_to(gate, "bus")
    (True, False)
    """
    for key in _ACCESS_KEYS[mode]:
        value = tags.get(key)
        if value is not None:
            return value in _CLOSED_VALUES
    return False


def read_osm(
    path: str | Path, options: ImportOptions | None = None, file_format: str | None = None
) -> tuple[RoadNetwork, ImportStats]:
    """Read the drivable road network of an OpenStreetMap file.

    Args:
        path: the map file.
        options: what to keep and how to project (defaults: :class:`ImportOptions`).
        file_format: an osmium format name (``"pbf"``, ``"xml"``...) when the file name
            does not say it.

    Returns:
        The network and the import counts.

    Raises:
        BadNetworkError: missing or unreadable file, no highway ways (empty extract),
            or no way left after the class and access rules.
    """
    options = options or ImportOptions()
    path = Path(path)
    if not path.is_file():
        raise BadNetworkError(f"{path}: no such file")
    kept_classes = options.kept_highways()
    stats = ImportStats(source_format="osm")
    source = f"OpenStreetMap {path.name}"

    way_rows: list[tuple[int, list[int], dict[str, str]]] = []
    try:
        for way in _processor(path, osmium.osm.WAY, file_format).with_filter(
            osmium.filter.KeyFilter("highway")
        ):
            if not isinstance(way, osmium.osm.Way):
                continue
            stats.ways_seen += 1
            tags = {t.k: t.v for t in way.tags}
            if tags["highway"] not in kept_classes:
                stats.excluded_class += 1
                continue
            if closed_to(tags, options.transport_mode):
                stats.excluded_access += 1
                continue
            refs = drop_consecutive_repeats([n.ref for n in way.nodes])
            way_rows.append((int(way.id), refs, tags))
    except RuntimeError as exc:  # libosmium reports unreadable input as RuntimeError
        raise BadNetworkError(f"{path}: not a readable OpenStreetMap file ({exc})") from exc
    if stats.ways_seen == 0:
        raise BadNetworkError(f"{path}: empty extract, no ways with a highway tag")

    wanted = {ref for _, refs, _ in way_rows for ref in refs}
    found: dict[int, tuple[float, float]] = {}
    if wanted:
        try:
            for node in _processor(path, osmium.osm.NODE, file_format).with_filter(
                osmium.filter.IdFilter(wanted)
            ):
                if not isinstance(node, osmium.osm.Node):
                    continue
                loc = node.location
                if loc.valid():
                    found[int(node.id)] = (loc.lon, loc.lat)
        except RuntimeError as exc:
            raise BadNetworkError(
                f"{path}: not a readable OpenStreetMap file ({exc})"
            ) from exc

    chains: list[Chain] = []
    roads: list[dict[str, Any]] = []
    for way_id, refs, tags in way_rows:
        runs, missing = _present_runs(refs, found)
        if missing:
            stats.ways_clipped += 1
            stats.missing_node_refs += missing
        if not runs:
            stats.degenerate += 1
            continue
        road = len(roads)
        roads.append({"name": tags.get("name"), "ref": tags.get("ref"),
                      "highway": tags["highway"]})
        direction = travel_direction(tags, options.transport_mode)
        chains.extend(
            Chain(way=way_id, road=road, nodes=np.asarray(run, dtype=np.int64),
                  direction=direction)
            for run in runs
        )
        stats.ways_kept += 1
    if stats.ways_clipped:
        stats.notes.append(
            f"{stats.ways_clipped} ways clipped at {stats.missing_node_refs} node references "
            "missing from the file (truncated extract)"
        )
    if not chains:
        raise BadNetworkError(
            f"{path}: no drivable roads among {stats.ways_seen} highway ways "
            f"({stats.excluded_class} other classes, {stats.excluded_access} closed to "
            f"motor vehicles, {stats.degenerate} without two present nodes)"
        )

    ids = np.fromiter(sorted(found), dtype=np.int64, count=len(found))
    lon = np.fromiter((found[i][0] for i in ids.tolist()), dtype=np.float64, count=len(ids))
    lat = np.fromiter((found[i][1] for i in ids.tolist()), dtype=np.float64, count=len(ids))
    network = assemble(chains, ids, lon, lat, roads, options, source, stats)
    return network, stats


def _processor(path: Path, entities: Any, file_format: str | None) -> osmium.FileProcessor:
    """A file processor over ``entities``; ``file_format`` overrides the name's suffix."""
    source: Any = osmium.io.File(str(path), file_format) if file_format else str(path)
    return osmium.FileProcessor(source, entities)


def _present_runs(
    refs: list[int], found: Mapping[int, tuple[float, float]]
) -> tuple[list[list[int]], int]:
    """Split ``refs`` at nodes missing from ``found``: (runs of >= 2 nodes, missing count).

    >>> _present_runs([1, 2, 3, 4, 5], {1: (0, 0), 2: (0, 0), 4: (0, 0), 5: (0, 0)})
    ([[1, 2], [4, 5]], 1)
    >>> _present_runs([7], {7: (0, 0)})
    ([], 0)
    """
    runs: list[list[int]] = []
    current: list[int] = []
    missing = 0
    for ref in refs:
        if ref in found:
            current.append(ref)
            continue
        missing += 1
        if len(current) >= 2:
            runs.append(current)
        current = []
    if len(current) >= 2:
        runs.append(current)
    return runs, missing
