"""Interleaved A/B of the tracker's (or the whole pipeline's) CPU per fix: two source trees.

This virtual machine's speed drifts by a third within minutes, so two timing runs made
one after the other compare the drift as much as the code. Here each tree runs in a
worker process of its own (``PYTHONPATH`` = the tree) that simulates the same drives
once, warms the compiled kernels, then waits; the parent asks both workers to match the
same drive in turn, alternating which goes first, and each reports the process CPU time
of ``Tracker.update`` over the drive's fixes plus ``flush`` (default settings). The
figure to read is the median over drives of the per-drive ratio new / base, which drift
between drives does not move; the pooled µs per fix are printed too (the first drive of
a tree whose kernels were not cached includes their compile time).

``--what pipeline`` times the whole per-message path instead: ``Pipeline.handle`` on the
drive's JSON messages, set up as ``bench/speed.py`` and ``bench/breakdown.py`` set it up
(each vehicle's own path as its route, 40 geofences near the drives; the same simulated
drives as ``--what tracker``, seed 2009/5), a fresh pipeline per drive that shares the
fleet's prepared routes, then ``flush``. The set-up is this script's own
(``bench/speed.py`` beside it); each tree only supplies ``livematch``.

``--new-matcher KEY=VALUE`` (``--what tracker``, repeatable): the new tree's trackers run
with these ``[matcher]`` settings (values read as TOML, as ``bench/accuracy.py
--matcher``), the base's with the defaults: a setting's CPU in one tree (``--base`` and
``--new`` the same checkout), without a throwaway checkout and its build.

``--base-env KEY=VALUE`` / ``--new-env KEY=VALUE`` (repeatable): an environment variable
for one worker: ``--base T --new T --base-env LIVEMATCH_KERNELS=jit`` times the kernels
under numba's JIT against the same kernels compiled ahead of time (``core/_jit.py``).

``--heading-sigma DEG`` (``--what tracker``): the drives' fixes report a course over
ground (``DriveSettings.heading_sigma_deg``); a setting such as ``heading_cost`` is then
compared by giving the two trees different defaults (a throwaway checkout with the
default changed).

Usage::

    git worktree add /tmp/base <rev>; ln -s "$PWD/.venv" /tmp/base/.venv
    .venv/bin/python bench/ab.py --base /tmp/base --new . [--extract helsinki]
        [--reps 6] [--drives 8] [--duration 600] [--every 1,15] [--what pipeline]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def worker(extract: str, drives: int, duration: float, what: str = "tracker",
           heading_sigma: float | None = None, matcher: str = "{}") -> None:
    """Serve requests ``<drive> <every>`` on stdin with ``[cpu_s, fixes]`` on stdout."""
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    if what == "pipeline":
        pipeline_worker(extract, drives, duration)
        return
    from _drives import drive_fixes, load_extract

    from livematch.core.candidates import warm_up
    from livematch.core.settings import MatchSettings
    from livematch.core.tracker import Tracker

    net = load_extract(extract)
    runs = drive_fixes(net, drives, duration, [2009, 5], heading_sigma)
    warm_up()
    settings = MatchSettings(**json.loads(matcher))  # --new-matcher's, else the defaults
    print("ready", flush=True)
    for line in sys.stdin:
        k, every = map(int, line.split())
        fixes = runs[k][::every]
        tracker = Tracker(net, fixes[0].vehicle, settings)
        t0 = time.process_time()
        for fix in fixes:
            tracker.update(fix)
        tracker.flush()
        print(json.dumps([time.process_time() - t0, len(fixes)]), flush=True)


def pipeline_worker(extract: str, drives: int, duration: float) -> None:
    """:func:`worker` for ``--what pipeline``: the CPU of ``Pipeline.handle`` per drive."""
    from speed import warmed_feeds

    by_drive, fresh = warmed_feeds(extract, drives, duration)
    print("ready", flush=True)
    for line in sys.stdin:
        k, every = map(int, line.split())
        feed = by_drive[k][::every]
        pipe = fresh()
        t0 = time.process_time()
        for t, topic, payload in feed:
            pipe.handle(topic, payload, t + 0.5)
        pipe.flush()
        print(json.dumps([time.process_time() - t0, len(feed)]), flush=True)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--base", required=True, help="source tree of the base (a checkout)")
    ap.add_argument("--new", default=str(ROOT), help="source tree of the new code")
    ap.add_argument("--extract", default="helsinki")
    ap.add_argument("--reps", type=int, default=6, help="rounds over all drives")
    ap.add_argument("--drives", type=int, default=8)
    ap.add_argument("--duration", type=float, default=600.0, help="seconds per drive")
    ap.add_argument("--every", default="1,15", help="seconds between fixes, comma list")
    ap.add_argument("--what", choices=("tracker", "pipeline"), default="tracker",
                    help="tracker: Tracker.update (default); pipeline: Pipeline.handle on "
                    "JSON messages (decode, route monitor, fences, records)")
    ap.add_argument("--heading-sigma", type=float, default=None, metavar="DEG",
                    help="--what tracker: fixes report their course over ground with this "
                    "error (degrees; DriveSettings.heading_sigma_deg; both trees' settings "
                    "decide whether it is read); default: no heading, as before")
    ap.add_argument("--new-matcher", action="append", default=[], metavar="KEY=VALUE",
                    help="--what tracker: the new tree's [matcher] settings (repeatable; "
                    "the base runs the defaults)")
    ap.add_argument("--base-env", action="append", default=[], metavar="KEY=VALUE",
                    help="an environment variable for the base's worker only (repeatable; "
                    "e.g. LIVEMATCH_KERNELS=jit: the kernels under numba's JIT)")
    ap.add_argument("--new-env", action="append", default=[], metavar="KEY=VALUE",
                    help="the same for the new tree's worker")
    ap.add_argument("--worker-matcher", default="{}", help=argparse.SUPPRESS)
    ap.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        worker(args.extract, args.drives, args.duration, args.what, args.heading_sigma,
               args.worker_matcher)
        return 0
    me = [sys.executable, str(Path(__file__).resolve()), "--base", args.base, "--worker",
          "--extract", args.extract, "--drives", str(args.drives),
          "--duration", str(args.duration), "--what", args.what]
    if args.heading_sigma is not None:
        me += ["--heading-sigma", str(args.heading_sigma)]

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from _pair import WorkerPair

    new_args: list[str] = []
    if args.new_matcher:
        from accuracy import matcher_settings

        new_args = ["--worker-matcher", json.dumps(matcher_settings(args.new_matcher))]
    def env(pairs: list[str]) -> dict[str, str]:
        return dict(p.split("=", 1) for p in pairs)

    workers = WorkerPair(me, args.base, args.new, new_args, env(args.base_env),
                         env(args.new_env))
    print(f"# bench/ab.py {' '.join(argv if argv is not None else sys.argv[1:])}; "
          f"load average {os.getloadavg()[0]:.2f}")
    for every in (int(e) for e in args.every.split(",")):
        pairs = []
        for rep in range(args.reps):
            for k in range(args.drives):
                pairs.append(workers.ask_both(f"{k} {every}", (rep + k) % 2 == 0))
        fixes = sum(a[1] for a, _ in pairs)
        q1, ratio, q3 = statistics.quantiles([b[0] / a[0] for a, b in pairs if a[0] > 0], n=4)
        us_base = 1e6 * sum(a[0] for a, _ in pairs) / fixes
        us_new = 1e6 * sum(b[0] for _, b in pairs) / fixes
        print(f"{args.extract} {args.what} every {every} s: base {us_base:.1f} µs/fix, "
              f"new {us_new:.1f} µs/fix (pooled); "
              f"median per-drive ratio new/base {ratio:.3f} (quartiles {q1:.3f}-{q3:.3f}, "
              f"{len(pairs)} pairs)")
    workers.close()
    print(f"# load average at the end {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
