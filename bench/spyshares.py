"""Where a livematch worker's samples go: py-spy raw stacks summed by part of the daemon.

Reads the raw collapsed stacks that ``bench/load.py --cpu-per-fix RATE --py-spy-to DIR``
keeps (one file per worker and step, ``<system>.<rate>.w<k>.<time>.txt``: one line per
distinct stack, ``frame;frame;... count``) and puts every sample in the first of these
parts whose function is on its stack, in this order:

- *keeping another worker's fix*: ``Daemon._take_raw`` (a standby shard's fix kept
  straight from the read buffer);
- *matching*: ``Pipeline.handle`` (decoding, the tracker, the monitors, the records);
- *checkpoints*: the checkpoint loop (exports, the shard writes to Redis);
- *reading the socket*: the reader callback and ``drain`` (``_read_packets``, paho's
  dispatch of what is not kept from the buffer, ``Daemon._arrive``, the intake queue);
- *sending*: ``publish_now`` and the joined writes (``write_soon``, ``coalesce``);
- *outputs*: the rest of ``Daemon._process`` and ``Daemon._route`` (encoding, routing);
- *receive loop*: the rest of ``Daemon._receive_loop``;
- *leases, shards, metrics*;
- *event loop, other*: everything else (the loop's own turns, timers, other threads).

Prints, per group of files (``LABEL=GLOB``, several files are averaged), the mean
samples per file in each part, its share, and the group's difference from the first
group. With ``--py-spy-to`` the sampler counts only the thread holding the GIL, so a
sample is about 1 / rate seconds of Python work (time in system calls, which release
the GIL, is not counted).

Usage::

    .venv/bin/python bench/spyshares.py 'with=DIR/livematch-2s.*.txt' \\
        'without=DIR/livematch-2s0.*.txt'
"""
from __future__ import annotations

import argparse
import collections
import glob
import sys

#: (part, functions any of which on a stack puts its sample there), first match wins.
PARTS: list[tuple[str, tuple[str, ...]]] = [
    ("keeping another worker's fix (`Daemon._take_raw`)", ("Daemon._take_raw",)),
    ("matching (`Pipeline.handle`)", ("Pipeline.handle",)),
    ("checkpoints", ("Daemon._checkpoint_loop", "Daemon._flush_shards")),
    ("reading the socket", ("buffered_reads.<locals>.loop_read", "_read_packets", "drain",
                            "Client._on_socket_open", "Daemon._arrive", "read_on")),
    ("sending", ("publish_now", "_publish_lean", "write_soon", "coalesce", "loop_write",
                 "Daemon._send_soon", "Daemon._publish_loop")),
    ("outputs (`_process`, `_route`)", ("Daemon._process", "Daemon._route")),
    ("receive loop", ("Daemon._receive_loop", "IntakeQueue")),
    ("leases, shards, metrics", ("Daemon._lease_loop", "Daemon._renewed", "Daemon._shard_loop",
                                 "RenewalThread", "_render_metrics", "_sync_counters")),
]
OTHER = "event loop, other"


def part_of(stack: list[str]) -> str:
    """The part a sample belongs to, from its stack's function names (outermost first).

    >>> part_of(["run", "Daemon._receive_loop", "Daemon._process", "Pipeline.handle"])
    'matching (`Pipeline.handle`)'
    >>> part_of([])
    'event loop, other'
    """
    names = set(stack)
    for part, functions in PARTS:
        if not names.isdisjoint(functions):
            return part
    return OTHER


def function_name(frame: str) -> str:
    """``Daemon._arrive (livematch/service/daemon.py:1611)`` -> ``Daemon._arrive``.

    >>> function_name("drain (livematch/service/mqtt.py:140)"), function_name("x")
    ('drain', 'x')
    """
    return frame.split(" (", 1)[0]


def count(paths: list[str]) -> collections.Counter[str]:
    """Samples per part summed over py-spy raw files."""
    parts: collections.Counter[str] = collections.Counter()
    for path in paths:
        with open(path, encoding="utf-8") as f:
            for line in f:
                stack, _, n = line.rstrip("\n").rpartition(" ")
                if stack and n.isdigit():
                    parts[part_of([function_name(x) for x in stack.split(";")])] += int(n)
    return parts


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("groups", nargs="+", help="LABEL=GLOB: py-spy raw files of one group")
    args = ap.parse_args(argv)
    groups: list[tuple[str, int, collections.Counter[str]]] = []
    for spec in args.groups:
        label, _, pattern = spec.partition("=")
        paths = sorted(glob.glob(pattern))
        if not paths:
            print(f"{spec}: no file matches", file=sys.stderr)
            return 2
        groups.append((label, len(paths), count(paths)))
    names = [p for p, _ in PARTS] + [OTHER]
    head = " | ".join(f"{label} ({n} files)" for label, n, _ in groups)
    print(f"Mean samples per file (share); differences from {groups[0][0]}.\n")
    print(f"| part | {head} |" + "".join(f" {label} - {groups[0][0]} |"
                                        for label, _, _ in groups[1:]))
    print("|---|" + "---:|" * (2 * len(groups) - 1))
    for name in [*names, "all"]:
        cells, means = [], []
        for _label, n, parts in groups:
            total = sum(parts.values())
            v = total if name == "all" else parts[name]
            means.append(v / n)
            cells.append(f"{v / n:.0f} ({v / max(1, total):.1%})")
        diffs = [f"{m - means[0]:+.0f}" for m in means[1:]]
        print(f"| {name} | " + " | ".join(cells) + " |"
              + "".join(f" {d} |" for d in diffs))
    return 0


if __name__ == "__main__":
    sys.exit(main())
