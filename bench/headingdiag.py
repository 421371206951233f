"""Where ``heading_cost`` wins and loses on one decision cell: per drive and per fix.

Matches one cell of ``bench/matcher_ab.py`` (its drives, fixes and scoring, from
``bench/accuracy.py``) with ``heading_cost`` 0 and with ``--matcher`` settings, on fixes
that report a course (``--heading-sigma``), and prints:

- every drive whose route mismatch changes by more than 1 m, with the change (metres)
  and the directed segments the new committed path holds more or fewer times than the
  base's (a short segment with its twin: an out-and-back past a corner; a one-way ring);
- the fixes whose final answer the new run loses or wins, by drive, by what the vehicle
  truly did (``bench/accuracy.py``'s motion classes), by whether the fix reported a
  course, by the true speed at the fix (below 3 m/s: the simulator's course is noisier,
  and a device that reports speed would have the course ignored below
  ``HEADING_MIN_MPS``), and by the course's error (more than 20 degrees off the truth).

Usage::

    .venv/bin/python bench/headingdiag.py --sim trips --extract test --seed 77 \\
        --interval 1 --heading-sigma 5 --matcher heading_cost=5 [--drives 80]
"""

from __future__ import annotations

import argparse
import sys
from collections import Counter
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

import accuracy as acc  # noqa: E402

from livematch.sim.drive import DriveSettings, drivable_segments, observe  # noqa: E402
from livematch.sim.logs import replay_records  # noqa: E402
from livematch.sim.score import TruePath, route_mismatch_fraction  # noqa: E402


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--sim", default="trips", choices=sorted(acc.SIM_MODELS))
    ap.add_argument("--extract", default="test")
    ap.add_argument("--seed", type=int, default=77)
    ap.add_argument("--interval", type=int, default=1)
    ap.add_argument("--drives", type=int, default=80)
    ap.add_argument("--duration", type=float, default=900.0)
    ap.add_argument("--heading-sigma", type=float, default=5.0, metavar="DEG")
    ap.add_argument("--matcher", action="append", default=[], metavar="KEY=VALUE")
    args = ap.parse_args(argv)
    settings = DriveSettings(duration_s=args.duration, sigma_m=5.0, tau_s=45.0,
                             outlier_p=0.01, heading_sigma_deg=args.heading_sigma,
                             **acc.SIM_MODELS[args.sim])
    network = acc.load_network(acc.extract_path(args.extract))
    ei = {"helsinki": 0, "test": 1}.get(args.extract, 0)  # as bench/matcher_ab.py
    drives = acc.simulate_drives(network, args.seed, ei, args.drives, settings,
                                 drivable_segments(network))
    fleet = [(d, observe(d, args.interval)) for d in drives]
    records = replay_records(network, fleet)
    xy = acc.roundtrip_xy(network, records)
    times = {d.vehicle: [o.t for o in obs] for d, obs in fleet}
    new = acc.matcher_settings(args.matcher)
    runs = {"base": acc.run_inproc(network, records, xy, times, {**new, "heading_cost": 0.0}),
            "new": acc.run_inproc(network, records, xy, times, new)}
    for label, run in runs.items():
        sc = acc.score(network, fleet, run)
        print(f"{label}: live {sc['road_dir_live']:.4f} final {sc['road_dir_final']:.4f} "
              f"route mismatch {100 * sc['route_mismatch']:.3f} %")
    total = 0.0
    print("drives whose route mismatch changes (metres; segments more / fewer in the new path):")
    rows: list[dict[str, Any]] = []
    for d, obs in fleet:
        lo = d.truth[obs[0].truth_index].path_index
        hi = d.truth[obs[-1].truth_index].path_index
        true_path = d.path[lo:hi + 1]
        length = float(sum(network.seg_len[s] for s in true_path))
        paths = {k: [int(s) for s in r.matches[d.vehicle].path] for k, r in runs.items()}
        delta = length * (route_mismatch_fraction(true_path, paths["new"], network.seg_len)
                          - route_mismatch_fraction(true_path, paths["base"],
                                                    network.seg_len))
        total += delta
        if abs(delta) > 1.0:
            more = Counter(paths["new"]) - Counter(paths["base"])
            fewer = Counter(paths["base"]) - Counter(paths["new"])
            print(f"  {d.vehicle} {delta:+.1f} m  more {dict(more)} fewer {dict(fewer)}")
        tp = TruePath(d.path, network.seg_len)
        motion = acc.motion_states(network, d)
        for i, o in enumerate(obs):
            p = d.truth[o.truth_index]
            ok = {}
            for k, r in runs.items():
                f = r.matches[d.vehicle].final[i]
                ok[k] = f is not None and tp.near(f.segment, p.path_pos_m, acc.TOL_M)
            if ok["base"] == ok["new"]:
                continue
            j = o.truth_index
            a, b = d.truth[max(0, j - 1)], d.truth[min(len(d.truth) - 1, j + 1)]
            speed = (b.path_pos_m - a.path_pos_m) / max(1.0, b.t - a.t)
            err = (None if o.heading is None or d.true_heading is None
                   else abs((o.heading - float(d.true_heading[j]) + 180.0) % 360.0 - 180.0))
            rows.append({"won": ok["new"], "drive": d.vehicle, "motion": motion[j],
                         "course": o.heading is not None, "slow": speed < 3.0,
                         "wild": err is not None and err > 20.0})
    print(f"  all drives: {total:+.1f} m")
    for what in (False, True):
        part = [r for r in rows if r["won"] == what]
        print(f"final fixes {'won' if what else 'lost'}: {len(part)}")
        for key in ("drive", "motion", "course", "slow", "wild"):
            print(f"  by {key}: {dict(Counter(r[key] for r in part).most_common(8))}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
