"""Where livematch's final answers miss, by cause, and an A/B of matcher settings.

Runs the drives and scoring of ``bench/accuracy.py`` (its own functions:
``simulate_drive``, ``observe``, ``replay_records``, ``run_inproc``, ``score``) with
livematch in process, for the seeds, drive models, extracts and intervals given. Each
(seed, model, extract) is simulated once; every interval is matched with the base
settings and, with ``--new KEY=VALUE``, with those too, on the same fixes.

Every final miss (a fix whose settled directed segment is not on the true path within
30 m, ``bench/accuracy.py``'s road+dir) is put in an *episode*, a run of consecutive
missed fixes of one drive, and each episode gets one cause, the first that fits in this
order (a diagnostic of the harness, read from the truth and from what the tracker did):

- ``unanswered``: a fix without a final answer;
- ``coincident way``: for most fixes of the episode the answered segment joins the same
  two vertices, with the same length within 1 m, as another segment of the true path
  within two of the truth's (the map has two ways over one road; no fix can tell them
  apart; the answered segment itself on the path nearby is not one);
- ``start``: the episode begins in the first 30 s of the drive's log;
- ``end``: it ends in the last 30 s (settled by the end-of-log flush or just before);
- stands (most of the episode's fixes are at truth seconds where the vehicle does not
  move, ``bench/accuracy.py``'s ``motion_states``):
  ``stand: stand_at_vertex, wrong approach`` (the rule reported the stand at a vertex as
  the end of a road the vehicle did not come in by), ``stand: wrong direction`` (the
  twin of the true segment), ``stand: fixes drift > eps`` (more than a quarter of the
  episode's fixes that are not outliers lie more than 15 m from the truth),
  ``stand: road out of V`` (the answer lies on a segment that starts at the vertex
  the vehicle stands at or next to, within 15 m: the stand dragged onto a road not
  driven), ``stand: other``;
- moving: ``outlier`` (an outlier fix within two fixes of the episode), ``forced
  commit`` (a fix of the episode was settled by a forced commit, ``max_lag_*``),
  ``turn between fixes`` (the truth turns round, a segment then its twin, between the
  fix before and the fix after one of the episode's: at 15-30 s mostly in and out of a
  dead end), ``wrong direction`` (twin of the true segment), ``roundabout`` (the true or the
  answered road is tagged junction=roundabout/circular), ``on path, > 30 m`` (the answer
  is on the true path but out of the tolerance), ``junction`` (the answered segment
  shares a vertex with the true segment or the one before or after it on the path),
  ``parallel/close`` (the answered point within 20 m of the truth, on a road that does
  not touch it), ``other``.

Usage::

    .venv/bin/python bench/fleetmiss.py --seeds 31,77 --sim trips --extract helsinki \\
        --intervals 1,5 --drives 80 [--new stand_resume=true] [--json OUT]
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from collections import Counter, defaultdict
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

import accuracy as acc  # noqa: E402

from livematch.core import tracker as tracker_mod  # noqa: E402
from livematch.sim.drive import DriveSettings, observe  # noqa: E402
from livematch.sim.logs import replay_records  # noqa: E402
from livematch.sim.score import TruePath  # noqa: E402

EDGE_S = 30.0
EPS_M = 15.0

#: (vehicle, fix time) -> how the fix was settled: "forced", "flush" or "agreed"
SETTLED: dict[tuple[str, float], str] = {}
#: (vehicle, fix time) of fixes whose answer stand_at_vertex moved
MOVED: set[tuple[str, float]] = set()
#: (vehicle, fix time) of fixes whose node stand_turnback rebuilt (the stand and the way back)
TURNED: set[tuple[str, float]] = set()


def _instrument() -> None:
    """Wrap the tracker's commit, stand_at_vertex and stand_turnback to record what they did.

    Only a tracker that runs as Python can be wrapped: a compiled one (mypyc, session 24)
    calls its own methods directly, so the wrappers see nothing and the causes read from
    them (``forced commit``, ``stand: stand_at_vertex, wrong approach``) and the dump's
    ``how`` / ``sav`` / ``turned`` stay empty; the other classes are unaffected. A warning
    says so; run from a copy of the tree that was never built for those.
    """
    from livematch import native

    if "livematch.core.tracker" in native.compiled():
        print("bench/fleetmiss.py: the tracker is compiled here, so forced commits, "
              "stand_at_vertex's wrong approaches and the dump's how / sav / turned are "
              "not recorded (their episodes fall in later classes); run from a copy of "
              "the tree that was never built for them", file=sys.stderr)
    orig_commit = tracker_mod.Tracker._commit_chain
    orig_sav = tracker_mod.Tracker._stand_at_vertex

    def commit(self: Any, tree: Any, row: int, events: list[Any], prune: Any,
               settle_all: bool = False, built: Any = None) -> None:
        n = len(events)
        orig_commit(self, tree, row, events, prune, settle_all, built)
        kind = "forced" if prune is not None else "flush" if settle_all else "agreed"
        for ev in events[n:]:
            for f in getattr(ev, "fixes", ()):
                SETTLED[(self.vehicle, float(f.t))] = kind

    def sav(self: Any, chain: Any, before: Any, goes_on: bool, starts: bool, eps: float,
            fixes: list[Any]) -> None:
        old = list(fixes)
        orig_sav(self, chain, before, goes_on, starts, eps, fixes)
        for a, b in zip(old, fixes, strict=True):
            if a != b:
                MOVED.add((self.vehicle, float(b.t)))

    orig_turn = tracker_mod.Tracker._turn_back_at_stand

    def turn(self: Any, chain: Any, before: Any, eps: float) -> Any:
        out = orig_turn(self, chain, before, eps)
        if out is not chain:
            for a, b in zip(chain, out, strict=True):
                if (a.seg, a.pos) != (b.seg, b.pos):
                    TURNED.add((self.vehicle, float(b.t)))
        return out

    tracker_mod.Tracker._commit_chain = commit  # type: ignore[method-assign]
    tracker_mod.Tracker._stand_at_vertex = sav  # type: ignore[method-assign]
    tracker_mod.Tracker._turn_back_at_stand = turn  # type: ignore[method-assign]


def roundabout(network: Any, seg: int) -> bool:
    tags = network.roads[int(network.seg_road[seg])]
    return tags.get("junction") in ("roundabout", "circular")


def classify(network: Any, drive: Any, obs: list[Any], match: Any,
             motion: list[str]) -> list[tuple[str, list[int]]]:
    """The miss episodes of one drive: (cause, fix indices)."""
    tp = TruePath(drive.path, network.seg_len)
    sf, st, twin = network.seg_from, network.seg_to, network.seg_twin
    nxy = network.node_xy
    miss = []
    for i, o in enumerate(obs):
        p = drive.truth[o.truth_index]
        f = match.final[i]
        miss.append(f is None or not tp.near(f.segment, p.path_pos_m, acc.TOL_M))
    out = []
    i = 0
    t0, t1 = obs[0].t, obs[-1].t
    while i < len(obs):
        if not miss[i]:
            i += 1
            continue
        j = i
        while j < len(obs) and miss[j]:
            j += 1
        idx = list(range(i, j))
        out.append((_cause(network, drive, obs, match, motion, idx, t0, t1, tp,
                           sf, st, twin, nxy), idx))
        i = j
    return out


def _cause(network: Any, drive: Any, obs: list[Any], match: Any, motion: list[str],
           idx: list[int], t0: float, t1: float, tp: Any, sf: Any, st: Any, twin: Any,
           nxy: Any) -> str:
    v = drive.vehicle
    truths = [drive.truth[obs[i].truth_index] for i in idx]
    finals = [match.final[i] for i in idx]
    if any(f is None for f in finals):
        return "unanswered"
    # the answered segment joins the same two vertices, with the same length within 1 m,
    # as a segment of the true path near the truth: two ways over one road (the map
    # draws it twice), which no fix can tell apart
    dup = 0
    for p, f in zip(truths, finals, strict=True):
        near = drive.path[max(0, p.path_index - 2):p.path_index + 3]
        dup += any(s != f.segment and int(sf[s]) == int(sf[f.segment])
                   and int(st[s]) == int(st[f.segment])
                   and abs(float(network.seg_len[s]) - float(network.seg_len[f.segment])) < 1.0
                   for s in near)
    if 2 * dup >= len(idx):
        return "coincident way"
    if obs[idx[0]].t - t0 < EDGE_S:
        return "start"
    if t1 - obs[idx[-1]].t < EDGE_S:
        return "end"
    still = sum(motion[obs[i].truth_index] != "moving" for i in idx)
    if 2 * still >= len(idx):
        if any((v, obs[i].t) in MOVED for i in idx):
            return "stand: stand_at_vertex, wrong approach"
        if any(int(twin[p.segment]) == f.segment for p, f in zip(truths, finals, strict=True)):
            return "stand: wrong direction"
        far = [math.hypot(obs[i].x - p.x, obs[i].y - p.y) > EPS_M
               for i, p in zip(idx, truths, strict=True) if not obs[i].outlier]
        if 4 * sum(far) > len(far):
            return "stand: fixes drift > eps"
        for p, f in zip(truths, finals, strict=True):
            a = int(sf[f.segment])
            if math.hypot(nxy[a, 0] - p.x, nxy[a, 1] - p.y) <= EPS_M:
                return "stand: road out of V"
        return "stand: other"
    lo, hi = max(0, idx[0] - 2), min(len(obs), idx[-1] + 3)
    if any(obs[i].outlier for i in range(lo, hi)):
        return "outlier"
    if any(SETTLED.get((v, float(obs[i].t))) == "forced" for i in idx):
        return "forced commit"
    pairs = list(zip(truths, finals, strict=True))
    if any(_turns_between(drive, obs, i, twin) for i in idx):
        return "turn between fixes"
    if any(int(twin[p.segment]) == f.segment for p, f in pairs):
        return "wrong direction"
    if any(roundabout(network, p.segment) or roundabout(network, f.segment) for p, f in pairs):
        return "roundabout"
    if any(f.segment in set(drive.path) for _, f in pairs):
        return "on path, > 30 m"
    for p, f in pairs:
        k = p.path_index
        near_segs = drive.path[max(0, k - 1):k + 2]
        verts = {int(sf[s]) for s in near_segs} | {int(st[s]) for s in near_segs}
        if int(sf[f.segment]) in verts or int(st[f.segment]) in verts:
            return "junction"
    if min(math.hypot(f.x - p.x, f.y - p.y) for p, f in pairs) <= 20.0:
        return "parallel/close"
    return "other"


def _turns_between(drive: Any, obs: list[Any], i: int, twin: Any) -> bool:
    """Whether the truth turns round (a segment, then its twin) between fix i-1 and i+1."""
    a = drive.truth[obs[max(0, i - 1)].truth_index].path_index
    b = drive.truth[obs[min(len(obs) - 1, i + 1)].truth_index].path_index
    return any(int(twin[drive.path[j]]) == drive.path[j + 1] for j in range(a, b))


def _episode(network: Any, drive: Any, obs: list[Any], match: Any, motion: list[str],
             cause: str, idx: list[int], cell: tuple[Any, ...]) -> dict[str, Any]:
    """One episode's fixes with their truth and answers, for reading by hand."""
    rows = []
    for i in range(max(0, idx[0] - 3), min(len(obs), idx[-1] + 4)):
        o = obs[i]
        p = drive.truth[o.truth_index]
        f = match.final[i]
        lv = match.live[i]
        rows.append({
            "i": i, "t": o.t - obs[0].t, "miss": i in idx, "motion": motion[o.truth_index],
            "out": o.outlier, "true": [p.segment, round(p.offset_m, 1)],
            "err": round(math.hypot(o.x - p.x, o.y - p.y), 1),
            "final": None if f is None else [f.segment, round(f.offset_m, 1),
                                             round(math.hypot(f.x - p.x, f.y - p.y), 1)],
            "live": None if lv is None else lv.segment,
            "how": SETTLED.get((drive.vehicle, float(o.t))),
            "sav": (drive.vehicle, float(o.t)) in MOVED,
            "turned": (drive.vehicle, float(o.t)) in TURNED,
        })
    k0 = drive.truth[obs[idx[0]].truth_index].path_index
    return {"cell": cell, "vehicle": drive.vehicle, "cause": cause, "n": len(idx),
            "path": list(drive.path[max(0, k0 - 3):k0 + 4]), "fixes": rows}


def cell_metrics(network: Any, fleet: list[Any], run: Any) -> dict[str, Any]:
    row = acc.score(network, fleet, run)
    return {k: row[k] for k in ("fixes", "road_dir_live", "road_dir_final",
                                "route_mismatch", "err_median_m")}


def final_ok(network: Any, fleet: list[Any], run: Any) -> dict[tuple[str, int], bool]:
    out = {}
    for drive, obs in fleet:
        tp = TruePath(drive.path, network.seg_len)
        m = run.matches[drive.vehicle]
        for i, o in enumerate(obs):
            p = drive.truth[o.truth_index]
            f = m.final[i]
            out[(drive.vehicle, i)] = f is not None and tp.near(f.segment, p.path_pos_m,
                                                                acc.TOL_M)
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", default="31,77")
    ap.add_argument("--sim", default="trips", help="comma list of bench/accuracy.py models")
    ap.add_argument("--extract", default="helsinki")
    ap.add_argument("--intervals", default="1,5")
    ap.add_argument("--drives", type=int, default=80)
    ap.add_argument("--duration", type=float, default=900.0)
    ap.add_argument("--base", action="append", default=[], metavar="KEY=VALUE",
                    help="[matcher] setting of the base run (default: the defaults)")
    ap.add_argument("--new", action="append", default=[], metavar="KEY=VALUE",
                    help="[matcher] setting of the new run; none: no A/B")
    ap.add_argument("--json", default=None, help="write the results here")
    ap.add_argument("--dump", default=None,
                    help="write every base-run episode (fixes, truth, answers) here, "
                         "one JSON line each")
    ap.add_argument("--heading-sigma", type=float, default=None, metavar="DEG",
                    help="fixes report their course over ground with this error (degrees; "
                         "DriveSettings.heading_sigma_deg); default: no heading, as before")
    args = ap.parse_args(argv)
    _instrument()
    base = acc.matcher_settings(args.base)
    new = {**base, **acc.matcher_settings(args.new)} if args.new else None
    results: list[dict[str, Any]] = []
    dump = open(args.dump, "w", encoding="utf-8") if args.dump else None  # noqa: SIM115
    for sim in args.sim.split(","):
        settings = DriveSettings(duration_s=args.duration, sigma_m=5.0, tau_s=45.0,
                                 outlier_p=0.01, heading_sigma_deg=args.heading_sigma,
                                 **acc.SIM_MODELS[sim])
        for seed in [int(s) for s in args.seeds.split(",")]:
            for ei, name in enumerate(args.extract.split(",")):
                # the extract's index as in bench/accuracy.py (helsinki 0, test 1)
                eidx = list(acc.EXTRACTS).index(name) if name in acc.EXTRACTS else ei
                network = acc.load_network(acc.extract_path(name))
                allowed = acc.drivable_segments(network)
                t_sim = time.perf_counter()
                drives = acc.simulate_drives(network, seed, eidx, args.drives, settings,
                                             allowed)
                t_sim = time.perf_counter() - t_sim
                motions = {d.vehicle: acc.motion_states(network, d) for d in drives}
                for k in [int(x) for x in args.intervals.split(",")]:
                    fleet = [(d, observe(d, k)) for d in drives]
                    records = replay_records(network, fleet)
                    xy = acc.roundtrip_xy(network, records)
                    times = {d.vehicle: [o.t for o in obs] for d, obs in fleet}
                    row: dict[str, Any] = {"sim": sim, "seed": seed, "extract": name,
                                           "interval_s": k, "sim_s": round(t_sim, 1)}
                    for label, matcher in (("base", base), ("new", new)):
                        if matcher is None:
                            continue
                        SETTLED.clear()
                        MOVED.clear()
                        TURNED.clear()
                        run = acc.run_inproc(network, records, xy, times, matcher)
                        row[label] = cell_metrics(network, fleet, run)
                        row[label]["turned_fixes"] = len(TURNED)
                        causes: Counter[str] = Counter()
                        episodes: Counter[str] = Counter()
                        for d, obs in fleet:
                            for cause, idx in classify(network, d, obs,
                                                       run.matches[d.vehicle],
                                                       motions[d.vehicle]):
                                causes[cause] += len(idx)
                                episodes[cause] += 1
                                if dump is not None and label == "base":
                                    dump.write(json.dumps(_episode(
                                        network, d, obs, run.matches[d.vehicle],
                                        motions[d.vehicle], cause, idx,
                                        (sim, seed, name, k))) + "\n")
                        row[label]["miss_fixes"] = dict(causes.most_common())
                        row[label]["miss_episodes"] = dict(episodes.most_common())
                        row[label + "_ok"] = final_ok(network, fleet, run)
                    if new is not None:
                        a, b = row.pop("base_ok"), row.pop("new_ok")
                        row["gained"] = sum(b[x] and not a[x] for x in a)
                        row["lost"] = sum(a[x] and not b[x] for x in a)
                        lost_by: dict[str, int] = defaultdict(int)
                        for x in a:
                            if a[x] and not b[x]:
                                lost_by[x[0]] += 1
                        row["lost_by_drive"] = dict(lost_by)
                    else:
                        row.pop("base_ok")
                    results.append(row)
                    print(json.dumps(row), flush=True)
    if args.json:
        Path(args.json).write_text(json.dumps({"argv": argv or sys.argv[1:], "base": base,
                                               "new": new, "rows": results}, indent=1),
                                   encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
