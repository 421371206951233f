"""Benchmark helper: a livematch worker's py-spy samples by part of the daemon.

Run: ``.venv/bin/python bench/spycat.py FILE [FILE ...] [--fixes N ...]``

Reads the raw (collapsed) stacks that ``bench/load.py --cpu-per-fix ... --py-spy-to DIR``
writes for every livematch worker (py-spy ``--gil``: the thread holding the GIL, so an
event loop blocked in ``epoll`` is not counted) and puts every sample in the first
part of the daemon (below) that one of its frames belongs to, the rules in order: the
innermost frames win over the loops around them because the rules name the inner
functions first. The compiled per-fix modules (mypyc) leave no Python frames: their
time shows as the self time of the Python function that called them, so
``Daemon._handle`` less its Python callees is *pipeline handle* (``Pipeline.handle``)
and ``Daemon._export`` is mostly ``Pipeline.export_vehicle`` (checkpoints).

Printed per file: samples in all, then per part its samples, its share, and with
``--fixes`` (one count per file, in order: the fixes that worker *matched* in the
step, or the whole feed) the milliseconds per fix at the sampling rate ``--rate``
(samples a second, as given to ``--py-spy-rate``). The sampler is slowed by what it
samples and counts a thread that holds the GIL while the kernel has it waiting for a
core, so shares are what to compare; the milliseconds are approximate.
"""

from __future__ import annotations

import argparse
import collections
from pathlib import Path

from load import collapsed_stacks

#: (part, a substring of one frame's "function (file:line)"), first match wins.
RULES: tuple[tuple[str, str], ...] = (
    ("route: encode", "encode_record"),
    ("route: encode", "_plain_floats"),
    ("route: publish", "_publish_lean"),
    ("route: publish", "publish_now"),
    ("route: publish", "Daemon._enqueue"),
    ("route: other", "Daemon._route"),
    ("handle: metrics", "PlainHistogram.observe"),
    ("pipeline handle", "Daemon._handle"),
    ("checkpoint export", "Daemon._export"),
    ("checkpoint redis write", "save_many"),
    ("checkpoint other", "_flush_state"),
    ("checkpoint other", "_checkpoint_loop"),
    ("standby connection", "_read_standby"),
    ("standby connection", "_standby_late"),
    ("kept raw (main connection)", "_take_raw"),
    ("arrive (intake key, keep)", "Daemon._arrive"),
    ("receive: decode", "handle_publish"),
    ("receive: PUBACK", "handle_puback"),
    ("process other", "Daemon._process"),
    ("socket read", "drain ("),
    ("socket read", "loop_read"),
    ("socket write", "flush ("),
    ("socket write", "loop_write"),
    ("leases, shards", "_lease_loop"),
    ("leases, shards", "_renewed"),
    ("leases, shards", "Renewal"),
    ("leases, shards", "_shard_loop"),
    ("receive loop other", "_receive_loop"),
    ("metrics endpoint", "service/http.py"),
)


def categorise(path: Path) -> tuple[collections.Counter[str], int]:
    """Samples per part of one py-spy raw file, and the samples in all."""
    parts: collections.Counter[str] = collections.Counter()
    total = 0
    for stack, n in collapsed_stacks(path):
        total += n
        for part, needle in RULES:
            if needle in stack:
                parts[part] += n
                break
        else:
            parts["event loop, other"] += n
    return parts, total


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("files", nargs="+", type=Path)
    ap.add_argument("--fixes", type=int, nargs="*", default=[],
                    help="per file: the fixes to divide by (ms per fix)")
    ap.add_argument("--rate", type=int, default=1000, help="py-spy samples a second")
    args = ap.parse_args(argv)
    for k, path in enumerate(args.files):
        parts, total = categorise(path)
        fixes = args.fixes[k] if k < len(args.fixes) else 0
        print(f"{path.name}: {total} samples"
              + (f", {total / args.rate * 1000 / fixes:.4f} ms per fix" if fixes else ""))
        for part, n in sorted(parts.items(), key=lambda kv: -kv[1]):
            per_fix = f"  {n / args.rate * 1000 / fixes:.4f} ms" if fixes else ""
            print(f"  {n:6d}  {n / total:6.3f}{per_fix}  {part}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
