"""Simulated drives as a replay log (what the feed would have carried) and a truth file.

The record builders (:func:`replay_records`, :func:`truth_records`) are pure; only
:func:`write_jsonl` and :func:`read_truth` touch files.

Replay log (the format of DESIGN §7): JSON Lines, one message per line, in receive
order (``at``, then vehicle)::

    {"at": 1767225600.412, "topic": "fleet/sim-003/position",
     "payload": {"vehicle": "sim-003", "time": 1767225600.0,
                 "lat": 60.1699123, "lon": 24.9384456, "accuracy": 7.6}}

``at`` is the fix time plus a small receive delay (below 1 s by default, so fixes of one
vehicle never arrive out of order). Coordinates are WGS84 degrees rounded to 1e-7
(about 1 cm), converted with the network's own projection.

Truth file (``livematch-sim-truth``, version 1): JSON Lines, three kinds of record,
distinguished by ``kind``:

- ``header`` (first line): ``format``, ``version``, ``crs`` (the projection of every
  ``x``/``y`` below), ``network`` (where the network came from), ``interval_s``,
  ``settings`` (the simulation parameters) and ``seed`` when known.
- ``path``, one per vehicle, before its fixes: ``vehicle``, ``segments`` (the directed
  segments truly driven, in order, each ``{"way", "from_node", "to_node"}`` -- the same
  source ids as the published assignment and commit records), ``length_m``.
- ``fix``, one per published fix: ``vehicle``, ``time`` (equal to the message's
  ``time``: together they are the key into the replay log); the true position ``x``,
  ``y`` (metres), ``lat``, ``lon``; the true segment as ``way``, ``from_node``,
  ``to_node``; ``offset_m`` along it; ``path_index`` (index into the vehicle's
  ``segments``, since a segment can be driven twice); ``path_pos_m`` (metres driven from
  the start of the path); ``outlier`` (whether the observed fix is an outlier); and the
  observed ``obs_lat`` / ``obs_lon`` as published.

Example of a fix record::

    {"kind": "fix", "vehicle": "sim-003", "time": 1767225600.0, "x": 12.5, "y": -40.25,
     "lat": 60.1716, "lon": 24.9445, "way": 4236349, "from_node": 25291483,
     "to_node": 25291484, "offset_m": 3.2, "path_index": 0, "path_pos_m": 3.2,
     "outlier": false, "obs_lat": 60.17161, "obs_lon": 24.94448}
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterable, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from livematch.core.network import RoadNetwork
from livematch.errors import LivematchError
from livematch.sim.drive import Drive, DriveSettings, Observation

TRUTH_FORMAT = "livematch-sim-truth"
TRUTH_VERSION = 1


class BadTruthFileError(LivematchError):
    """A truth file cannot be read (not JSON, wrong format or version, unknown record)."""


def _ids(network: RoadNetwork, segment: int) -> dict[str, int]:
    way, from_node, to_node = network.source_ids(segment)
    return {"way": way, "from_node": from_node, "to_node": to_node}


def _lonlat(
    network: RoadNetwork, xs: Sequence[float], ys: Sequence[float]
) -> list[tuple[float, float]]:
    if not xs:
        return []
    lon, lat = network.projection.to_lonlat(np.asarray(xs), np.asarray(ys))
    return [(round(float(a), 7), round(float(b), 7)) for a, b in zip(lon, lat, strict=True)]


def replay_records(
    network: RoadNetwork, fleet: Sequence[tuple[Drive, list[Observation]]],
    topic: str = "fleet/{vehicle}/position",
) -> list[dict[str, Any]]:
    """Replay-log records of every observed fix of every drive, in receive order.

    Args:
        network: the network the drives were simulated on (its projection converts to
            WGS84).
        fleet: (drive, its observations) pairs.
        topic: topic template; ``{vehicle}`` is replaced by the vehicle id.
    """
    out: list[dict[str, Any]] = []
    for drive, obs in fleet:
        coords = _lonlat(network, [o.x for o in obs], [o.y for o in obs])
        for o, (lon, lat) in zip(obs, coords, strict=True):
            payload: dict[str, Any] = {"vehicle": drive.vehicle, "time": o.t, "lat": lat,
                                       "lon": lon, "accuracy": o.accuracy}
            if o.speed is not None:  # only when the drive reports speed
                payload["speed"] = o.speed
            if o.heading is not None:  # only when the drive reports a course, and moves
                payload["heading"] = o.heading
            out.append({
                "at": round(o.t + o.delay_s, 3),
                "topic": topic.format(vehicle=drive.vehicle),
                "payload": payload,
            })
    out.sort(key=lambda r: (r["at"], r["payload"]["vehicle"]))
    return out


def truth_records(
    network: RoadNetwork, fleet: Sequence[tuple[Drive, list[Observation]]], interval_s: int,
    settings: DriveSettings, seed: int | None = None,
) -> list[dict[str, Any]]:
    """Truth-file records (header, then per vehicle its path and its fixes)."""
    out: list[dict[str, Any]] = [{
        "kind": "header", "format": TRUTH_FORMAT, "version": TRUTH_VERSION,
        "crs": network.projection.crs, "network": network.source, "interval_s": interval_s,
        "settings": asdict(settings), "seed": seed,
    }]
    for drive, obs in fleet:
        length = float(sum(network.seg_len[s] for s in drive.path))
        out.append({"kind": "path", "vehicle": drive.vehicle,
                    "segments": [_ids(network, s) for s in drive.path],
                    "length_m": round(length, 3)})
        truth = [drive.truth[o.truth_index] for o in obs]
        true_ll = _lonlat(network, [p.x for p in truth], [p.y for p in truth])
        obs_ll = _lonlat(network, [o.x for o in obs], [o.y for o in obs])
        for o, p, (lon, lat), (olon, olat) in zip(obs, truth, true_ll, obs_ll, strict=True):
            out.append({
                "kind": "fix", "vehicle": drive.vehicle, "time": o.t,
                "x": round(p.x, 3), "y": round(p.y, 3), "lat": lat, "lon": lon,
                **_ids(network, p.segment), "offset_m": round(p.offset_m, 3),
                "path_index": p.path_index, "path_pos_m": round(p.path_pos_m, 3),
                "outlier": o.outlier, "obs_lat": olat, "obs_lon": olon,
            })
    return out


def write_jsonl(path: str | os.PathLike[str], records: Iterable[dict[str, Any]]) -> None:
    """Write records as JSON Lines (UTF-8, compact separators, one record per line)."""
    with open(path, "w", encoding="utf-8") as f:
        for r in records:
            f.write(json.dumps(r, separators=(",", ":"), ensure_ascii=False))
            f.write("\n")


@dataclass
class VehicleTruth:
    """One vehicle's truth as read back from a truth file (source ids, not indices).

    Attributes:
        path: the driven segments as (way, from_node, to_node).
        fixes: the ``fix`` records of this vehicle, in file order.
    """

    path: list[tuple[int, int, int]] = field(default_factory=list)
    fixes: list[dict[str, Any]] = field(default_factory=list)


def read_truth(path: str | os.PathLike[str]) -> tuple[dict[str, Any], dict[str, VehicleTruth]]:
    """Read a truth file: (header, vehicle -> :class:`VehicleTruth`).

    Raises:
        BadTruthFileError: when the file is not a version-1 truth file (names the file and line).
    """
    vehicles: dict[str, VehicleTruth] = {}
    header: dict[str, Any] = {}
    with Path(path).open(encoding="utf-8") as f:
        for lineno, line in enumerate(f, 1):
            if not line.strip():
                continue
            try:
                rec = json.loads(line)
            except json.JSONDecodeError as exc:
                raise BadTruthFileError(f"{path}:{lineno}: not JSON: {exc}") from exc
            kind = rec.get("kind")
            if lineno == 1:
                if kind != "header" or rec.get("format") != TRUTH_FORMAT:
                    raise BadTruthFileError(f"{path}:1: not a {TRUTH_FORMAT} file")
                if rec.get("version") != TRUTH_VERSION:
                    raise BadTruthFileError(f"{path}:1: truth version {rec.get('version')!r}, "
                                     f"this reader knows {TRUTH_VERSION}")
                header = rec
            elif kind == "path":
                vehicles.setdefault(rec["vehicle"], VehicleTruth()).path = [
                    (s["way"], s["from_node"], s["to_node"]) for s in rec["segments"]]
            elif kind == "fix":
                vehicles.setdefault(rec["vehicle"], VehicleTruth()).fixes.append(rec)
            else:
                raise BadTruthFileError(f"{path}:{lineno}: unknown record kind {kind!r}")
    return header, vehicles
