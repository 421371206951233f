"""Scoring a replay's outputs against a truth file: roads, route mismatch, alerts.

Two truth formats are read, both JSON Lines keyed into the replay log by
(``vehicle``, ``time``):

* ``livematch-sim-truth`` version 1, written by the drive simulator and read with
  :func:`livematch.sim.logs.read_truth` (see :mod:`livematch.sim.logs` for its records);
* ``livematch-demo-truth`` version 1, written by the demo scenario
  (:mod:`livematch.demo.scenario`): the same ``header`` / ``path`` / ``fix`` records
  (``fix`` records with ``"silent": true`` were never published and are not scored) plus
  ``incident`` records: ``type``, ``vehicle``, ``start``, ``end`` (epoch s) and facts.

Measures (:func:`score_run`), over the published fixes of the truth:

* ``road_dir_live`` / ``road_dir_final``: share of fixes whose live (assignment) /
  final (commit) directed segment lies on the truly driven path within 30 m, measured
  along the path, of the true position (:class:`livematch.sim.score.TruePath`, the same
  measure as ``bench/accuracy.py``); a fix without an answer counts as wrong.
* ``route_mismatch``: Newson & Krumm's route mismatch fraction
  (:func:`livematch.sim.score.route_mismatch_fraction`) of the committed path against
  the true path between each vehicle's first and last published fix, pooled:
  sum(added + missed) / sum(true length).
* with incidents: each incident type that an alert should report (:data:`EXPECTED`) is
  *detected* when an alert of that kind (for ``zone_exit``: a ``fence_exit`` of that
  zone's fence) for that vehicle has a time in [``start``, ``end`` + ``grace_s``];
  ``detection delay`` is that alert's time minus ``start``. A *false alert* is an alert
  of a scored kind (:data:`SCORED_KINDS`, and ``fence_exit`` of a zone fence) that no
  such incident window explains. ``fence_enter`` / ``fence_exit`` / ``fence_dwell`` of
  customer and depot fences, ``on_route``, ``on_network`` and ``fresh`` are normal
  operation and not scored.
"""

from __future__ import annotations

import gzip
import json
import os
import shutil
import tempfile
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

import numpy as np

from livematch.core.network import RoadNetwork
from livematch.errors import LivematchError
from livematch.sim.logs import TRUTH_FORMAT as SIM_FORMAT
from livematch.sim.logs import VehicleTruth, read_truth
from livematch.sim.score import TruePath, route_mismatch_fraction

__all__ = ["DEMO_FORMAT", "EXPECTED", "SCORED_KINDS", "TOL_M", "BadTruthError", "Truth",
           "load_truth", "score_run", "segment_lookup"]

DEMO_FORMAT = "livematch-demo-truth"
#: Along-path tolerance of the road-and-direction measure, metres (as bench/accuracy.py).
TOL_M = 30.0
#: Incident type -> the alert kind that should report it.
EXPECTED = {"detour": "off_route", "zone_exit": "fence_exit", "silent": "stale"}
#: Alert kinds that are always an incident's report (never normal operation).
SCORED_KINDS = frozenset({"off_route", "wrong_direction", "off_network", "stale"})
#: Seconds after an incident's end within which its alert still counts (persistence
#: times delay alerts; 60 s covers the default off_route_s of 10 s with room to spare).
GRACE_S = 60.0

Triple = tuple[int, int, int]


class BadTruthError(LivematchError):
    """A truth file cannot be read or does not fit the road network."""


@dataclass
class Truth:
    """A truth file read back.

    Attributes:
        format: ``livematch-sim-truth`` or ``livematch-demo-truth``.
        header: the header record.
        vehicles: per vehicle the driven path (source ids) and its published fixes.
        incidents: ``incident`` records (demo truth only), in file order.
        zones: fence ids that are delivery zones (their exits are scored).
    """

    format: str
    header: dict[str, Any]
    vehicles: dict[str, VehicleTruth]
    incidents: list[dict[str, Any]] = field(default_factory=list)
    zones: frozenset[str] = frozenset()


def _open_text(path: Path) -> IO[str]:
    if path.name.endswith(".gz"):
        return gzip.open(path, "rt", encoding="utf-8")
    return path.open(encoding="utf-8")


def load_truth(path: str | os.PathLike[str]) -> Truth:
    """Read a simulator or demo truth file (see the module docstring); gzip when ``.gz``.

    Raises:
        BadTruthError: naming the file (and line) when it is neither format.
    """
    p = Path(path)
    try:
        with _open_text(p) as f:
            first = f.readline()
    except OSError as exc:
        raise BadTruthError(f"cannot read truth file {str(p)!r}: {exc}") from exc
    try:
        head = json.loads(first)
    except ValueError as exc:
        raise BadTruthError(f"{p}:1: not JSON: {exc}") from exc
    fmt = head.get("format") if isinstance(head, dict) else None
    if fmt == SIM_FORMAT:
        try:
            if not p.name.endswith(".gz"):
                header, vehicles = read_truth(p)
            else:  # read_truth reads plain files: hand it a decompressed copy
                with tempfile.TemporaryDirectory() as tmp:
                    plain = Path(tmp) / p.name[:-3]
                    with _open_text(p) as src, plain.open("w", encoding="utf-8") as dst:
                        shutil.copyfileobj(src, dst)
                    header, vehicles = read_truth(plain)
        except (OSError, EOFError, LivematchError) as exc:
            raise BadTruthError(f"{p}: {exc}") from exc
        return Truth(SIM_FORMAT, header, vehicles)
    if fmt == DEMO_FORMAT:
        return _read_demo(p)
    raise BadTruthError(f"{p}:1: not a truth file (format {fmt!r}; expected "
                        f"{SIM_FORMAT!r} or {DEMO_FORMAT!r})")


def _read_demo(path: Path) -> Truth:
    vehicles: dict[str, VehicleTruth] = {}
    incidents: list[dict[str, Any]] = []
    header: dict[str, Any] = {}
    with _open_text(path) as f:
        for lineno, line in enumerate(f, 1):
            if not line.strip():
                continue
            try:
                rec = json.loads(line)
                kind = rec["kind"]
                if lineno == 1:
                    if rec.get("version") != 1:
                        raise BadTruthError(f"{path}:1: {DEMO_FORMAT} version "
                                            f"{rec.get('version')!r}, this reader knows 1")
                    header = rec
                elif kind == "path":
                    vehicles.setdefault(rec["vehicle"], VehicleTruth()).path = [
                        (s["way"], s["from_node"], s["to_node"]) for s in rec["segments"]]
                elif kind == "fix":
                    if not rec.get("silent", False):
                        vehicles.setdefault(rec["vehicle"], VehicleTruth()).fixes.append(rec)
                elif kind == "incident":
                    incidents.append(rec)
                else:
                    raise BadTruthError(f"{path}:{lineno}: unknown record kind {kind!r}")
            except (ValueError, KeyError, TypeError) as exc:
                raise BadTruthError(f"{path}:{lineno}: not a truth record: {exc!r}") from exc
    zones = frozenset(v["zone"] for v in header.get("vehicles", []) if v.get("zone"))
    return Truth(DEMO_FORMAT, header, vehicles, incidents, zones)


def segment_lookup(network: RoadNetwork) -> dict[Triple, int]:
    """(way, from_node, to_node) -> segment index (the first, should a triple repeat)."""
    out: dict[Triple, int] = {}
    for s in range(network.n_segments):
        out.setdefault(tuple(int(v) for v in network.source_ids(s)), s)  # type: ignore[arg-type]
    return out


def _triple(rec: Mapping[str, Any]) -> Triple:
    return int(rec["way"]), int(rec["from_node"]), int(rec["to_node"])


def _rate(num: int, den: int) -> float | None:
    return round(num / den, 4) if den else None


def score_run(truth: Truth, network: RoadNetwork, lookup: Mapping[Triple, int],
              assignments: Iterable[Mapping[str, Any]], commits: Iterable[Mapping[str, Any]],
              alerts: Sequence[Mapping[str, Any]], *, grace_s: float = GRACE_S
              ) -> dict[str, Any]:
    """Accuracy and alert measures of one run's outputs (see the module docstring).

    Args:
        truth: the truth.
        network: the road network the run matched on (segment lengths).
        lookup: :func:`segment_lookup` of ``network``.
        assignments, commits, alerts: the run's output records.
        grace_s: seconds after an incident's end within which its alert still counts.

    Returns:
        ``truth_fixes``, ``road_dir_live``, ``road_dir_final``, ``route_mismatch``
        (shares rounded to 4 decimals; None with nothing to score); with incidents also
        ``incidents``, ``detected``, ``missed``, ``detection_delay_p50_s``,
        ``detection_delay_max_s``, ``false_alerts``, ``false_alerts_by_kind`` and
        ``incident_results`` (one entry per scored incident).

    Raises:
        BadTruthError: a truth segment does not exist in ``network``.
    """
    live: dict[tuple[str, float], Triple] = {}
    for rec in assignments:
        live[(rec["vehicle"], float(rec["time"]))] = _triple(rec)
    final: dict[tuple[str, float], Triple] = {}
    paths: dict[str, list[int]] = {}
    for rec in commits:
        v = rec["vehicle"]
        for f in rec["fixes"]:
            final[(v, float(f["time"]))] = _triple(f)
        paths.setdefault(v, []).extend(
            s for s in (lookup.get(_triple(p)) for p in rec["path"]) if s is not None)

    def index(triple: Triple, vehicle: str) -> int:
        try:
            return lookup[triple]
        except KeyError:
            raise BadTruthError(f"truth segment {triple} of vehicle {vehicle!r} is not in the "
                                "road network replayed on (another map?)") from None

    n = live_ok = final_ok = 0
    mismatch = true_len = 0.0
    for vehicle in sorted(truth.vehicles):
        vt = truth.vehicles[vehicle]
        if not vt.fixes:
            continue
        driven = [index(t, vehicle) for t in vt.path]
        tp = TruePath(driven, network.seg_len)
        for fx in vt.fixes:
            key = (vehicle, float(fx["time"]))
            pos = float(fx["path_pos_m"])
            n += 1
            seg = lookup.get(live[key]) if key in live else None
            live_ok += seg is not None and tp.near(seg, pos, TOL_M)
            seg = lookup.get(final[key]) if key in final else None
            final_ok += seg is not None and tp.near(seg, pos, TOL_M)
        lo, hi = vt.fixes[0]["path_index"], vt.fixes[-1]["path_index"]
        true_path = driven[lo:hi + 1]
        length = float(sum(network.seg_len[s] for s in true_path))
        if length > 0:
            mismatch += route_mismatch_fraction(true_path, paths.get(vehicle, []),
                                                network.seg_len) * length
            true_len += length
    out: dict[str, Any] = {
        "truth_fixes": n,
        "road_dir_live": _rate(live_ok, n),
        "road_dir_final": _rate(final_ok, n),
        "route_mismatch": round(mismatch / true_len, 4) if true_len else None,
    }
    if truth.incidents:
        out.update(score_alerts(truth, alerts, grace_s=grace_s))
    return out


def _explains(incident: Mapping[str, Any], alert: Mapping[str, Any], grace_s: float) -> bool:
    kind = EXPECTED.get(incident["type"])
    if kind is None or alert["kind"] != kind or alert["vehicle"] != incident["vehicle"]:
        return False
    if kind == "fence_exit" and alert.get("fence") != incident.get("zone"):
        return False
    return float(incident["start"]) <= float(alert["time"]) <= float(incident["end"]) + grace_s


def score_alerts(truth: Truth, alerts: Sequence[Mapping[str, Any]], *,
                 grace_s: float = GRACE_S) -> dict[str, Any]:
    """Incident detection and false alerts (see the module docstring).

    Example (one detour, found 12 s after it began; one off_route with no detour):
        >>> t = Truth(DEMO_FORMAT, {}, {}, [{"type": "detour", "vehicle": "b",
        ...           "start": 100.0, "end": 160.0}])
        >>> s = score_alerts(t, [{"vehicle": "b", "time": 112.0, "kind": "off_route"},
        ...                      {"vehicle": "b", "time": 400.0, "kind": "off_route"}])
        >>> s["detected"], s["detection_delay_p50_s"], s["false_alerts"]
        (1, 12.0, 1)
        >>> score_alerts(t, [])["missed"]        # degenerate: no alert at all
        1
    """
    expected = [inc for inc in truth.incidents if inc["type"] in EXPECTED]
    results: list[dict[str, Any]] = []
    delays: list[float] = []
    for inc in expected:
        hits = [a for a in alerts if _explains(inc, a, grace_s)]
        first = min((float(a["time"]) for a in hits), default=None)
        delay = round(first - float(inc["start"]), 3) if first is not None else None
        if delay is not None:
            delays.append(delay)
        results.append({"type": inc["type"], "vehicle": inc["vehicle"],
                        "start": inc["start"], "end": inc["end"],
                        "alert": EXPECTED[inc["type"]], "detected": first is not None,
                        "delay_s": delay})
    false: Counter[str] = Counter()
    for a in alerts:
        scored = a["kind"] in SCORED_KINDS or (a["kind"] == "fence_exit"
                                               and a.get("fence") in truth.zones)
        if scored and not any(_explains(inc, a, grace_s) for inc in expected):
            false[a["kind"]] += 1
    return {
        "incidents": len(expected),
        "detected": sum(r["detected"] for r in results),
        "missed": sum(not r["detected"] for r in results),
        "detection_delay_p50_s": round(float(np.median(delays)), 3) if delays else None,
        "detection_delay_max_s": round(max(delays), 3) if delays else None,
        "false_alerts": sum(false.values()),
        "false_alerts_by_kind": dict(sorted(false.items())),
        "incident_results": results,
    }

