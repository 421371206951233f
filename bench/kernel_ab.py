"""Interleaved A/B of one tree step (``bench/kernel.py``'s ``tree + check``): two source trees.

``bench/kernel.py`` times each recorded step once per run, and on this shared machine two
runs minutes apart differ by more than a layout change moves the step. Here, as in
``bench/ab.py``, each tree runs in a worker process of its own (``PYTHONPATH`` = the
tree) that records the same 1 Hz sweep steps as ``bench/kernel.py`` (same drives, same
seed, default settings) and builds a candidate tree per step; the parent asks both
workers in turn, alternating which goes first, to time one drive's steps at one eps
level. A worker times ``CandidateTree.step`` (the step and the commit check, as
``bench/kernel.py``'s ``tree + check``: commit check one fix back) on a fresh tree per
step, the first call on that step's data, with ``time.perf_counter_ns`` around each call,
and answers the median µs per step of the drive. ``--call tracker`` times the same step
as the tracker calls it instead (``bench/kernel.py``'s ``tracker`` column: the compiled
entry point, no dispatcher type look-up). The figure to read is the median over
drives and rounds of the ratio new / base, per eps level; the medians of the two trees'
per-drive medians are printed too.

Usage::

    .venv/bin/python bench/kernel_ab.py --base /tmp/base --new . [--extract helsinki]
        [--reps 6] [--drives 8] [--duration 300] [--call step|tracker]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import time
from pathlib import Path

EPS_LEVELS = (15.0, 30.0, 60.0)


def worker(extract: str, drives: int, duration: float, seed: int, call: str) -> None:
    """Serve ``<drive> <level>`` on stdin with the median µs per step on stdout."""
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from _drives import drive_fixes, load_extract
    from kernel import direct_call, pack, record_steps

    from livematch.core import _sweep_kernel as _k
    from livematch.core.candidates import CandidateTree, warm_up
    from livematch.core.fastsweep import sweep_arrays
    from livematch.core.settings import MatchSettings

    settings = MatchSettings()
    net = load_extract(extract)
    ei = 1 if extract == "test" else 0  # the seeds of bench/kernel.py's --extract helsinki,test
    runs = [[(f.x, f.y) for f in fixes]
            for fixes in drive_fixes(net, drives, duration, [seed, ei])]
    steps = {(k, j): record_steps(net, pts, eps, settings)
             for k, pts in enumerate(runs) for j, eps in enumerate(EPS_LEVELS)}
    warm_up()
    arrays = sweep_arrays(next(iter(steps.values()))[0][1].view)
    net4 = (arrays.netf, arrays.neti, arrays.fbuf, arrays.ibuf)
    clock = time.perf_counter_ns
    print("ready", flush=True)
    for line in sys.stdin:
        k, j = map(int, line.split())
        todo = steps[(k, j)]
        trees = []
        for live, _ in todo:
            tree = CandidateTree.from_nodes(live)
            tree.compact(4 * len(live) + 16, 16 * len(live) + 64)  # room: no compaction
            trees.append(tree)
        scalars = [pack(live, ctx)[:_k.N_CTX] for live, ctx in todo]
        us = []
        for (_, ctx), tree, sc in zip(todo, trees, scalars, strict=True):
            seq = ctx.seq
            if call == "tracker":
                t0 = clock()
                direct_call(tree, net4, arrays, sc, seq, ctx.t)
                us.append((clock() - t0) / 1000.0)
            else:
                t0 = clock()
                tree.step(arrays, sc, seq, ctx.t, seq - 1, seq)
                us.append((clock() - t0) / 1000.0)
        print(json.dumps(statistics.median(us) if us else 0.0), flush=True)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--base", required=True, help="source tree of the base (a checkout)")
    ap.add_argument("--new", default=str(Path(__file__).resolve().parents[1]))
    ap.add_argument("--extract", default="helsinki")
    ap.add_argument("--reps", type=int, default=6, help="rounds over all drives")
    ap.add_argument("--drives", type=int, default=8)
    ap.add_argument("--duration", type=float, default=300.0, help="seconds per drive")
    ap.add_argument("--seed", type=int, default=2009)
    ap.add_argument("--call", choices=("step", "tracker"), default="step",
                    help="time CandidateTree.step, or the step as the tracker calls it")
    ap.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        worker(args.extract, args.drives, args.duration, args.seed, args.call)
        return 0
    me = [sys.executable, str(Path(__file__).resolve()), "--base", args.base, "--worker",
          "--extract", args.extract, "--drives", str(args.drives),
          "--duration", str(args.duration), "--seed", str(args.seed), "--call", args.call]

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from _pair import WorkerPair

    workers = WorkerPair(me, args.base, args.new)
    print(f"# bench/kernel_ab.py {' '.join(argv if argv is not None else sys.argv[1:])}; "
          f"load average {' / '.join(f'{v:.2f}' for v in os.getloadavg())}")
    pairs: dict[int, list[tuple[float, float]]] = {j: [] for j in range(len(EPS_LEVELS))}
    for rep in range(args.reps):
        for k in range(args.drives):
            for j in range(len(EPS_LEVELS)):
                pairs[j].append(workers.ask_both(f"{k} {j}", (rep + k + j) % 2 == 0))
    for j, eps in enumerate(EPS_LEVELS):
        got = [(a, b) for a, b in pairs[j] if a > 0]
        ratios = [b / a for a, b in got]
        ratio = statistics.median(ratios)
        q1, _, q3 = statistics.quantiles(ratios, n=4) if len(ratios) > 1 else (ratio,) * 3
        print(f"{args.extract} eps {eps:g} m: {args.call} median of per-drive medians "
              f"base {statistics.median(a for a, _ in got):.2f} µs, "
              f"new {statistics.median(b for _, b in got):.2f} µs; "
              f"median ratio new/base {ratio:.3f}, quartiles {q1:.3f}-{q3:.3f} "
              f"({len(got)} pairs)")
    workers.close()
    print(f"# load average at the end {' / '.join(f'{v:.2f}' for v in os.getloadavg())}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
