"""Which fixes' live answers a matcher setting changes, in one cell of the decision runs.

``bench/fleetmiss.py`` counts live road+dir per cell only; this lists the fixes behind a
change: the same drives (``bench/accuracy.py``'s ``simulate_drives``, the extract's index
as there), matched in process with the defaults and with ``--new KEY=VALUE``, and every
fix whose live answer is on the true path (within ``accuracy.TOL_M``) in one run and not
in the other, one JSON line each (vehicle, fix index, time, true segment, and per run
whether it was right and the segment answered).

    .venv/bin/python bench/livediff.py --sim plain --seed 31 --extract helsinki \\
        --interval 1 --new beam_margin=20 --new beam_keep=8
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

import accuracy as acc  # noqa: E402

from livematch.sim.drive import DriveSettings, observe  # noqa: E402
from livematch.sim.logs import replay_records  # noqa: E402
from livematch.sim.score import TruePath  # noqa: E402


def main(argv: list[str] | None = None) -> int:
    """Print the fixes whose live answer is right in one run and wrong in the other."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--sim", default="plain", choices=tuple(acc.SIM_MODELS))
    ap.add_argument("--seed", type=int, default=31)
    ap.add_argument("--extract", default="helsinki")
    ap.add_argument("--interval", type=int, default=1)
    ap.add_argument("--drives", type=int, default=80)
    ap.add_argument("--duration", type=float, default=900.0)
    ap.add_argument("--new", action="append", default=[], metavar="KEY=VALUE",
                    help="[matcher] setting of the new run (the base run: the defaults)")
    args = ap.parse_args(argv)
    settings = DriveSettings(duration_s=args.duration, sigma_m=5.0, tau_s=45.0,
                             outlier_p=0.01, **acc.SIM_MODELS[args.sim])
    network = acc.load_network(acc.extract_path(args.extract))
    drives = acc.simulate_drives(network, args.seed, list(acc.EXTRACTS).index(args.extract),
                                 args.drives, settings, acc.drivable_segments(network))
    fleet = [(d, observe(d, args.interval)) for d in drives]
    records = replay_records(network, fleet)
    xy = acc.roundtrip_xy(network, records)
    times = {d.vehicle: [o.t for o in obs] for d, obs in fleet}
    runs = [acc.run_inproc(network, records, xy, times, m)
            for m in ({}, acc.matcher_settings(args.new))]
    for d, obs in fleet:
        tp = TruePath(d.path, network.seg_len)
        for i, o in enumerate(obs):
            p = d.truth[o.truth_index]
            got = []
            for run in runs:
                live = run.matches[d.vehicle].live[i]
                ok = live is not None and tp.near(live.segment, p.path_pos_m, acc.TOL_M)
                got.append((bool(ok), None if live is None else int(live.segment)))
            if got[0][0] != got[1][0]:
                print(json.dumps({"vehicle": d.vehicle, "i": i, "t": o.t,
                                  "true_seg": int(p.segment), "base": got[0],
                                  "new": got[1]}), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
