"""The compiled network file (``.lmnet``) and opening a network from any source.

A ``.lmnet`` file is a numpy ``.npz`` archive (``np.savez``, read with
``allow_pickle=False``, so loading runs no code from the file) holding:

* ``node_xy`` (V, 2) float64 metres, ``node_id`` (V,) int64,
  ``seg_from``/``seg_to`` (E,) int32, ``seg_way`` (E,) int64, ``seg_road`` (E,) int32 —
  the constructor arrays of :class:`~livematch.core.network.RoadNetwork`; the derived
  arrays (lengths, adjacency, twins) are recomputed on load;
* ``meta``: a 0-d unicode array holding a JSON object with ``format``
  (``"livematch-network"``), ``version`` (2), ``crs`` (the projection as given to
  :class:`~livematch.core.geometry.Projection`), ``roads``, ``source``, ``options``
  (:class:`ImportOptions` or null), ``stats`` (:class:`ImportStats` or null) and
  ``built_at`` (whatever the caller passed, e.g. an ISO 8601 time; null when none).

Version 2 (this one) is written by builds that merge coincident segments (two ways over
the same nodes, :func:`livematch.core.network.merge_coincident`); the arrays are laid out
as in version 1. A version 1 file is still read, and its coincident segments are merged
on load, so it gives the network a fresh build of its source gives (the merge keeps the
first segment of each group in place, which is what the build does). Segment indices of
such a network move when anything was merged: a tracker checkpoint written against the
unmerged network is then refused (its segment count differs) and the vehicle starts
afresh, as after any change of map.

:func:`open_network` takes either a map source (``.osm.pbf``, ``.osm``, ``.osm.bz2``,
``.osm.gz``, ``.geojson``, ``.json``) or a compiled file, decided by the file name and,
when the name says nothing, by the first bytes.
"""

from __future__ import annotations

import json
import os
import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from livematch.core.geometry import Projection
from livematch.core.network import RoadNetwork, merge_coincident
from livematch.errors import BadNetworkError
from livematch.mapdata.geojson import read_geojson
from livematch.mapdata.options import ImportOptions, ImportStats
from livematch.mapdata.osm import read_osm

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "OpenedNetwork",
    "load_network",
    "open_network",
    "open_network_detailed",
    "save_network",
    "source_kind",
]

FORMAT_NAME = "livematch-network"
FORMAT_VERSION = 2
#: Versions :func:`load_network_detailed` reads (1: written before the coincident merge).
READABLE_VERSIONS = (1, 2)
_ARRAYS = ("node_xy", "node_id", "seg_from", "seg_to", "seg_way", "seg_road")
_OSM_SUFFIXES = (".osm.pbf", ".pbf", ".osm", ".osm.bz2", ".osm.gz", ".o5m", ".opl")
_GEOJSON_SUFFIXES = (".geojson", ".json")


@dataclass
class OpenedNetwork:
    """A network with what is known about how it was made.

    Attributes:
        network: the road network.
        kind: ``"osm"``, ``"geojson"`` or ``"lmnet"`` (what the path held).
        stats: import counts (None for a compiled file written without them).
        options: the import options used (None when unknown).
        built_at: the build time recorded in a compiled file (None otherwise).
    """

    network: RoadNetwork
    kind: str
    stats: ImportStats | None
    options: ImportOptions | None
    built_at: str | None = None


def save_network(
    network: RoadNetwork,
    path: str | Path,
    *,
    options: ImportOptions | None = None,
    stats: ImportStats | None = None,
    built_at: str | None = None,
) -> None:
    """Write ``network`` as a compiled ``.lmnet`` file (replacing ``path`` atomically).

    Args:
        network: the network to store.
        path: where to write; the name is used as given (no suffix is added).
        options, stats: import facts to keep for ``network info``.
        built_at: build time supplied by the caller (the library reads no clock).
    """
    path = Path(path)
    meta = {
        "format": FORMAT_NAME,
        "version": FORMAT_VERSION,
        "crs": network.projection.crs,
        "roads": network.roads,
        "source": network.source,
        "options": options.to_json() if options else None,
        "stats": stats.to_json() if stats else None,
        "built_at": built_at,
    }
    arrays = {name: getattr(network, name) for name in _ARRAYS}
    tmp = path.with_name(path.name + ".tmp")
    try:
        with open(tmp, "wb") as fh:
            np.savez(fh, meta=np.array(json.dumps(meta, ensure_ascii=False)), **arrays)
        os.replace(tmp, path)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise BadNetworkError(f"{path}: cannot write network file ({exc})") from exc


def load_network(path: str | Path) -> RoadNetwork:
    """Read a compiled ``.lmnet`` file (see :func:`load_network_detailed`)."""
    return load_network_detailed(path).network


def load_network_detailed(path: str | Path) -> OpenedNetwork:
    """Read a compiled ``.lmnet`` file with its stored options, stats and build time.

    Raises:
        BadNetworkError: missing file, not a livematch network file, another format
            version, or inconsistent arrays.
    """
    path = Path(path)
    if not path.is_file():
        raise BadNetworkError(f"{path}: no such file")
    try:
        with np.load(path, allow_pickle=False) as data:
            if "meta" not in data.files:
                raise BadNetworkError(f"{path}: not a livematch network file (no metadata)")
            meta = json.loads(str(data["meta"][()]))
            if not isinstance(meta, dict) or meta.get("format") != FORMAT_NAME:
                raise BadNetworkError(f"{path}: not a livematch network file")
            version = meta.get("version")
            if version not in READABLE_VERSIONS:
                raise BadNetworkError(
                    f"{path}: network file format version {version!r}, this "
                    f"livematch reads versions {', '.join(map(str, READABLE_VERSIONS))}; "
                    "rebuild it with 'livematch network build'"
                )
            missing = [name for name in _ARRAYS if name not in data.files]
            if missing:
                raise BadNetworkError(f"{path}: network file lacks arrays {missing}")
            arrays = {name: data[name] for name in _ARRAYS}
            if version == 1:
                _merge_v1(arrays, meta)
    except (OSError, ValueError, zipfile.BadZipFile, json.JSONDecodeError) as exc:
        raise BadNetworkError(f"{path}: not a livematch network file ({exc})") from exc
    try:
        network = RoadNetwork(
            projection=Projection(str(meta["crs"])),
            roads=list(meta["roads"]),
            source=str(meta.get("source", "")),
            **arrays,
        )
    except (KeyError, TypeError, ValueError) as exc:
        raise BadNetworkError(f"{path}: damaged network file ({exc})") from exc
    options = meta.get("options")
    stats = meta.get("stats")
    return OpenedNetwork(
        network=network,
        kind="lmnet",
        stats=ImportStats.from_json(stats) if isinstance(stats, dict) else None,
        options=ImportOptions.from_json(options) if isinstance(options, dict) else None,
        built_at=meta.get("built_at"),
    )


def _merge_v1(arrays: dict[str, np.ndarray], meta: dict[str, object]) -> None:
    """Merge the coincident segments of a version 1 file in place (as a build would)."""
    roads = meta.get("roads")
    if not isinstance(roads, list):
        raise ValueError("roads missing")
    try:
        merge = merge_coincident(arrays["seg_from"], arrays["seg_to"], arrays["seg_way"],
                                 arrays["seg_road"], roads)
    except (AttributeError, IndexError, TypeError) as exc:  # damaged roads or arrays
        raise ValueError(f"cannot merge coincident segments: {exc}") from exc
    if merge.merged:
        for name in ("seg_from", "seg_to"):
            arrays[name] = arrays[name][merge.keep]
        for name in ("seg_way", "seg_road"):
            arrays[name] = arrays[name][merge.report]
    stats = meta.get("stats")
    if isinstance(stats, dict):
        stats["coincident_merged"] = merge.merged
        stats["coincident_pairs"] = merge.pairs
        if merge.merged:
            stats.setdefault("notes", []).append(
                f"version 1 file: {merge.merged} directed segments merged on load into "
                f"another over the same two nodes ({merge.pairs} node pairs)")


def source_kind(path: str | Path) -> str:
    """``"lmnet"``, ``"osm"``, ``"osm-pbf"``, ``"osm-xml"`` or ``"geojson"`` for ``path``.

    The name decides when it ends in a known suffix (``"osm"`` then leaves the format to
    osmium); otherwise the first bytes do: a zip archive is a compiled network, ``{`` is
    GeoJSON, ``<`` is OSM XML, ``OSMHeader`` near the start is OSM PBF.

    Raises:
        BadNetworkError: missing file or unrecognised content.
    """
    path = Path(path)
    if not path.is_file():
        raise BadNetworkError(f"{path}: no such file")
    name = path.name.lower()
    if name.endswith(".lmnet"):
        return "lmnet"
    if name.endswith(_OSM_SUFFIXES):
        return "osm"
    if name.endswith(_GEOJSON_SUFFIXES):
        return "geojson"
    with open(path, "rb") as fh:
        head = fh.read(64)
    text = head.lstrip(b"\xef\xbb\xbf \t\r\n")
    if head.startswith(b"PK"):
        return "lmnet"
    if text.startswith(b"{"):
        return "geojson"
    if text.startswith(b"<"):
        return "osm-xml"
    if b"OSMHeader" in head:
        return "osm-pbf"
    raise BadNetworkError(
        f"{path}: not a road map (expected OpenStreetMap, GeoJSON or a .lmnet file)"
    )


def open_network_detailed(
    path: str | Path, options: ImportOptions | None = None
) -> OpenedNetwork:
    """Open a map source or compiled file, keeping the import facts (for ``info``).

    ``options`` applies to map sources; a compiled file keeps the options it was built with.
    """
    kind = source_kind(path)
    if kind == "lmnet":
        return load_network_detailed(path)
    options = options or ImportOptions()
    if kind == "geojson":
        network, stats = read_geojson(path, options)
        return OpenedNetwork(network, "geojson", stats, options)
    fmt = {"osm-pbf": "pbf", "osm-xml": "xml"}.get(kind)
    network, stats = read_osm(path, options, file_format=fmt)
    return OpenedNetwork(network, "osm", stats, options)


def open_network(path: str | Path, options: ImportOptions | None = None) -> RoadNetwork:
    """A :class:`RoadNetwork` from a map source (OSM, GeoJSON) or a compiled ``.lmnet``.

    Example:
        ``open_network("helsinki.osm.pbf")`` imports with the default options;
        ``open_network("helsinki.lmnet")`` loads a compiled file.
    """
    return open_network_detailed(path, options).network
