"""How many atomic reference-count updates the compiled kernels make per fix, by kernel.

numba keeps an array's memory alive with a reference count that compiled code updates
through ``NRT_incref`` / ``NRT_decref``: a ``lock``-prefixed increment or decrement and a
call each, some 5 ns on this machine. LLVM's reference-count pruning removes the pairs it
can see are balanced, but not those around a loop: an array argument of a helper that
loops (even one numba inlines: its inliner binds the argument to a new variable) and an
array view (``a[i:j]``) made before a loop and dropped after it each cost one pair per
call. A sampling profiler shows them only as anonymous addresses inside the kernels'
calls (``py-spy --native``, ``perf``: a few per cent of the whole path); this script
counts them.

Run (needs ``gdb``; Linux, x86-64)::

    PYTHONPATH=$PWD .venv/bin/python bench/nrtcount.py [--extract helsinki] [--hits 30000]
        [--tree /path/to/another/checkout]

A child process runs the workload of ``bench/ab.py --what pipeline`` (``bench/speed.py``'s
``warmed_feeds``: the simulated 1 Hz drives, seed 2009/5, each vehicle's own path as its
route, 40 geofences, a fresh pipeline per drive) round after round, after printing the
entry address of every compiled kernel of ``livematch`` it has loaded, and writes the
number of messages handled so far into a small file after each one. ``gdb`` attaches,
breaks on ``NRT_incref`` and ``NRT_decref`` (every copy of them), records the return
address of each of the first ``--hits`` calls and the message count at the first and
last, and detaches; the child is then stopped. Each return address is charged to the
kernel whose entry address is the nearest below it (a kernel's library holds the code it
calls, laid out after its entry; an address past the last entry by more than a megabyte
is charged to ``?``). Printed: per kernel, the updates per message and their share, and
how many distinct call sites made them (one site per reference-count update in the
machine code: a group of sites with equal counts is one pair per call, or per loop
iteration).

The breakpoints slow the child several hundred times, so only counts are read, no time.
"""

from __future__ import annotations

import argparse
import bisect
import json
import os
import re
import struct
import subprocess
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: gdb's Python side: count the callers of the reference-count updates, then detach.
GDB_SCRIPT = """
import gdb, json, struct
from collections import Counter
hits = Counter()
seen = [0]
marks = []
def messages():
    with open(COUNTER, "rb") as f:
        return struct.unpack("<q", f.read(8))[0]
class Count(gdb.Breakpoint):
    def stop(self):
        sp = int(gdb.parse_and_eval("$sp"))
        ret = int(gdb.parse_and_eval("*(unsigned long *) %d" % sp))
        hits[ret] += 1
        seen[0] += 1
        if seen[0] == 1 or seen[0] >= LIMIT:
            marks.append(messages())
        return seen[0] >= LIMIT
gdb.execute("set pagination off")
points = [Count("NRT_incref"), Count("NRT_decref")]
gdb.execute("continue")
for p in points:
    p.delete()
with open(OUT, "w") as f:
    json.dump({"marks": marks, "hits": [[a, n] for a, n in hits.items()]}, f)
gdb.execute("detach")
"""


def child(extract: str, counter: str) -> None:
    """The workload, round after round, counting messages into ``counter``."""
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from numba.core.registry import CPUDispatcher
    from speed import warmed_feeds

    by_drive, fresh = warmed_feeds(extract, 8, 600.0)
    for feed in by_drive:  # every kernel the path calls, compiled or loaded
        pipe = fresh()
        for t, topic, payload in feed:
            pipe.handle(topic, payload, t + 0.5)
    seen: set[int] = set()
    for name, module in sorted(sys.modules.items()):
        if not name.startswith("livematch"):
            continue
        for attr, obj in sorted(vars(module).items()):
            if isinstance(obj, CPUDispatcher) and id(obj) not in seen:
                seen.add(id(obj))
                for cres in obj.overloads.values():
                    address = cres.library.get_pointer_to_function(cres.fndesc.llvm_func_name)
                    if address:
                        print(f"ENTRY {address} {attr}", flush=True)
    print("READY", flush=True)
    n = 0
    with open(counter, "r+b", buffering=0) as f:
        while True:
            for feed in by_drive:
                pipe = fresh()
                for t, topic, payload in feed:
                    pipe.handle(topic, payload, t + 0.5)
                    n += 1
                    f.seek(0)
                    f.write(struct.pack("<q", n))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--extract", default="helsinki")
    parser.add_argument("--hits", type=int, default=30000,
                        help="reference-count updates to record")
    parser.add_argument("--tree", default=str(ROOT),
                        help="the checkout whose livematch runs (default: this one)")
    parser.add_argument("--child", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(args.extract, args.child)
        return
    with tempfile.TemporaryDirectory() as tmp:
        counter = os.path.join(tmp, "messages")
        Path(counter).write_bytes(struct.pack("<q", 0))
        out = os.path.join(tmp, "hits.json")
        script = os.path.join(tmp, "count.py")
        Path(script).write_text(f"COUNTER = {counter!r}\nOUT = {out!r}\n"
                                f"LIMIT = {args.hits}\n" + GDB_SCRIPT)
        proc = subprocess.Popen(
            [sys.executable, __file__, "--extract", args.extract, "--child", counter],
            stdout=subprocess.PIPE, text=True, env={**os.environ, "PYTHONPATH": args.tree})
        assert proc.stdout is not None
        entries: list[tuple[int, str]] = []
        for line in proc.stdout:
            if line.startswith("ENTRY "):
                _, address, name = line.split()
                entries.append((int(address), name))
            elif line.startswith("READY"):
                break
        time.sleep(2.0)  # into the timed rounds
        try:
            subprocess.run(["gdb", "-p", str(proc.pid), "-batch", "-x", script],
                           check=True, capture_output=True, timeout=1800)
        finally:
            proc.kill()
            proc.wait()
        result = json.loads(Path(out).read_text())
    entries.sort()
    starts = [a for a, _ in entries]
    by_kernel: Counter[str] = Counter()
    sites: Counter[str] = Counter()
    for address, n in result["hits"]:
        i = bisect.bisect_right(starts, address) - 1
        name = entries[i][1] if i >= 0 and address - starts[i] < 1 << 20 else "?"
        by_kernel[name] += n
        sites[name] += 1
    first, last = result["marks"][0], result["marks"][-1]
    messages = max(1, last - first)
    total = sum(by_kernel.values())
    print(f"# bench/nrtcount.py --extract {args.extract} --hits {args.hits} --tree {args.tree}: "
          f"{total} "
          f"reference-count updates over {messages} messages, {total / messages:.0f} a message")
    print("| kernel (by entry) | updates per message | share | call sites |")
    print("|---|---:|---:|---:|")
    for name, n in by_kernel.most_common():
        print(f"| {name} | {n / messages:.1f} | {100 * n / total:.1f} % | {sites[name]} |")


if __name__ == "__main__":
    if re.match(r"^(linux)", sys.platform) is None:
        raise SystemExit("bench/nrtcount.py needs Linux (gdb attaching to a child)")
    main()
