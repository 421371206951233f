"""Where the whole per-message path's time goes, from a sampling profile (py-spy).

Two modes:

- ``bench/pathprofile.py run [--extract helsinki] [--reps 8]``: the workload of
  ``bench/ab.py --what pipeline`` in one process (the same simulated drives, seed
  2009/5, each vehicle's own path as its route, 40 geofences near the drives, a fresh
  :class:`~livematch.pipeline.Pipeline` per drive sharing the prepared routes), ``--reps``
  rounds over the drives after a warm-up, printing the CPU µs per fix. Run it under a
  sampling profiler, e.g. (py-spy installed in a venv of its own)::

      py-spy record -r 500 -f raw -o /tmp/path.raw -- \\
          .venv/bin/python bench/pathprofile.py run --extract helsinki --reps 8

- ``bench/pathprofile.py split /tmp/path.raw [--us 72]``: the samples taken inside
  ``Pipeline.handle`` / ``flush`` during the timed rounds, split into stages by the
  frames on each stack (the first stage whose function is on the stack wins, in the
  order decode, route monitor, fences, records, route lookup, tracker; the rest is
  "glue": ``handle``, ``_outputs``, the monitors' dispatch, event objects). A stage's
  compiled call (the numba kernel, dispatch included) and the pyproj calls are split out
  by the sampled line (the tracker's: the tree steps, the live answer, the commit
  checks, a commit's chain, new arrays). ``--us``: a per-fix time to turn the shares
  into µs (e.g. the pooled figure of an idle ``bench/ab.py`` run). ``--functions N``
  also prints the N functions with the largest inclusive share of those samples (which
  rule or helper is hot inside a stage).

A sampling profile without ``--native`` charges a compiled call's time to the Python
line that makes it, which is what the split needs; it slows the Python a little less
than cProfile does (no per-call hook), but the shares are still a profile's, not a
timing's: read them as proportions.
"""

from __future__ import annotations

import argparse
import re
import sys
import time
from collections import Counter
from collections.abc import Iterator
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: (stage, pattern of a frame on the stack): the first that matches names the sample.
STAGES = [
    ("decode", r"^PositionReader\.read "),
    ("route monitor", r"^RouteMonitor\.update "),
    ("fences", r"^(FenceMonitor\.update|FenceSet\.probe|FenceSet\.probe_clear"
               r"|FenceSet\.may_be_near) "),
    ("records", r"^RecordBuilder\.record "),
    ("route lookup", r"^Pipeline\._route_for "),
    ("tracker", r"^Tracker\.(update|flush) "),
]
#: The sampled leaf frames split out of a stage: (stage, pattern of the leaf, new name).
LEAVES = [
    ("decode", r"^Projection\.point_to_xy ", "decode: projection (pyproj)"),
    ("records", r"^Projection\.point_to_lonlat ", "records: projection (pyproj)"),
]
#: A stage's compiled call, found by its line: (stage, file, text on the line).
CALLS = [
    ("route monitor", "livematch/core/monitors/route.py", "route_advance("),
    ("fences", "livematch/core/monitors/fences.py", "fence_probe("),
    ("fences", "livematch/core/monitors/fences.py", "fence_probe_clear("),
]
#: The tracker's compiled calls, found by their lines: (file, texts on the line). Through
#: the dispatcher (``_t.``, the tracker's own ``sweep(`` ...) or at the entry point
#: (``_CALLS.``, livematch.core._direct), so that both an older and a newer tree split.
TREE_CALLS = [
    ("livematch/core/candidates.py", ("_t.", "_CALLS.")),
    ("livematch/core/tracker.py", ("_CALLS.", "= sweep(", "tree_live_answer(",
                                   "cut_and_check(")),
]


def run(extract: str, reps: int) -> None:
    """The timed workload (see the module docstring)."""
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from speed import warmed_feeds

    by_drive, fresh = warmed_feeds(extract, 8, 600.0)
    cpu = 0.0
    fixes = 0
    for _ in range(reps):
        for feed in by_drive:
            pipe = fresh()
            t0 = time.process_time()
            timed_rounds(pipe, feed)
            cpu += time.process_time() - t0
            fixes += len(feed)
    print(f"{extract}: {1e6 * cpu / fixes:.1f} µs CPU per fix over {fixes} fixes")


def timed_rounds(pipe: object, feed: list[tuple[float, str, bytes]]) -> None:
    """One drive through ``pipe`` (the frame ``split`` looks for)."""
    for t, topic, payload in feed:
        pipe.handle(topic, payload, t + 0.5)  # type: ignore[attr-defined]
    pipe.flush()  # type: ignore[attr-defined]


def lines_with(path: str, text: str) -> set[int]:
    """The lines of ``path`` (in this tree) that hold ``text`` outside a comment."""
    lines = (ROOT / path).read_text().splitlines()
    return {k + 1 for k, line in enumerate(lines)
            if text in line and not line.lstrip().startswith("#")}


def timed_stacks(path: str) -> Iterator[tuple[list[str], int]]:
    """The stacks of a py-spy raw profile (``frame;frame;... count`` per line) taken
    inside ``timed_rounds``, with their sample counts: the part both readings share."""
    for line in Path(path).read_text().splitlines():
        stack, _, count = line.rpartition(" ")
        frames = stack.split(";")
        if any(f.startswith("timed_rounds ") for f in frames):
            yield frames, int(count)


def split(path: str, us: float | None) -> None:
    """Print each stage's share of the samples in the timed rounds (module docstring)."""
    tree_lines = {(Path(file).name, k) for file, texts in TREE_CALLS for text in texts
                  for k in lines_with(file, text)}
    calls = [(stage, Path(file).name, lines_with(file, text)) for stage, file, text in CALLS]
    shares: Counter[str] = Counter()
    total = 0
    for frames, n in timed_stacks(path):
        total += n
        stage = "glue (handle, _outputs, monitors' dispatch, events)"
        for name, pattern in STAGES:
            if any(re.search(pattern, f) for f in frames):
                stage = name
                break
        leaf = frames[-1]
        if stage == "tracker":
            m = re.search(r"\(.*?([a-z_]+\.py):(\d+)\)$", leaf)
            stage = ("tracker: compiled calls"
                     if m and (m.group(1), int(m.group(2))) in tree_lines
                     else "tracker: Python")
        for name, pattern, renamed in LEAVES:
            if stage == name and re.search(pattern, leaf):
                stage = renamed
        for name, file, at in calls:
            m = re.search(r"\((.*?):(\d+)\)$", leaf)
            if stage == name and m and m.group(1).endswith(file) and int(m.group(2)) in at:
                stage = f"{name}: compiled call"
        shares[stage] += n
    if not total:
        print("no samples inside timed_rounds")
        return
    for stage, n in sorted(shares.items()):
        extra = f"  {us * n / total:5.1f} µs" if us else ""
        print(f"{100 * n / total:5.1f} %{extra}  {stage}")
    print(f"({total} samples)")


def functions(path: str, top: int) -> None:
    """Print the ``top`` functions with the largest inclusive share of the timed samples.

    A function counts once per sample however often it is on the stack (recursion),
    named as py-spy names it (``Class.method``); for reading which rule or helper is
    hot inside a stage.
    """
    incl: Counter[str] = Counter()
    total = 0
    for frames, n in timed_stacks(path):
        total += n
        for name in sorted({f.split(" (")[0] for f in frames}):
            incl[name] += n
    if not total:
        print("no samples inside timed_rounds")
        return
    for name, n in incl.most_common(top):
        print(f"{100 * n / total:5.1f} %  {name}")
    print(f"({total} samples)")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    sub = ap.add_subparsers(dest="mode", required=True)
    r = sub.add_parser("run")
    r.add_argument("--extract", default="helsinki")
    r.add_argument("--reps", type=int, default=8)
    s = sub.add_parser("split")
    s.add_argument("raw")
    s.add_argument("--us", type=float, default=None)
    s.add_argument("--functions", type=int, default=0, metavar="N",
                   help="also the N functions with the largest inclusive share")
    args = ap.parse_args(argv)
    if args.mode == "run":
        run(args.extract, args.reps)
    else:
        split(args.raw, args.us)
        if args.functions:
            functions(args.raw, args.functions)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
