"""Write the Larkmoor sample files of ``replay_logs/`` (deterministic bytes).

``python -m livematch.demo.samples [DIR]`` (or ``scripts/make_samples``) writes into DIR
(default ``replay_logs``):

* ``larkmoor-morning.jsonl.gz``: the replay log (DESIGN §7) of the 10-minute sample
  scenario (:func:`livematch.demo.scenario.build_scenario` with its defaults);
* ``larkmoor-truth.jsonl.gz``: its truth file (``livematch-demo-truth``);
* ``larkmoor.geojson``: the town's roads (the ``--network`` of ``livematch replay``);
* ``larkmoor-routes.geojson``: the bus routes L1–L4 (for ``--routes``);
* ``larkmoor-fences.geojson``: customer, depot and zone fences (for ``--fences``).

The same code gives the same bytes: gzip members carry mtime 0 and no file name,
JSON is written with fixed separators and key order, one record or feature per line.
This is the only module of :mod:`livematch.demo` that touches files.
"""

from __future__ import annotations

import gzip
import json
import os
import sys
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

from livematch.demo.scenario import Scenario, build_scenario
from livematch.demo.town import build_town, roads_geojson
from livematch.errors import LivematchError

__all__ = ["LOG_NAME", "SAMPLE_FILES", "main", "write_samples"]

LOG_NAME = "larkmoor-morning.jsonl.gz"
SAMPLE_FILES = (LOG_NAME, "larkmoor-truth.jsonl.gz", "larkmoor.geojson",
                "larkmoor-routes.geojson", "larkmoor-fences.geojson")


def _line(record: Any) -> bytes:
    return (json.dumps(record, separators=(",", ":"), ensure_ascii=False, allow_nan=False)
            + "\n").encode("utf-8")


def _write_gzip_lines(path: Path, records: Iterable[Any]) -> None:
    with open(path, "wb") as raw, gzip.GzipFile(filename="", mode="wb", fileobj=raw,
                                                compresslevel=9, mtime=0) as gz:
        for record in records:
            gz.write(_line(record))


def _write_collection(path: Path, doc: dict[str, Any]) -> None:
    """A FeatureCollection with one feature per line (readable diffs, valid JSON)."""
    features = doc["features"]
    body = b",\n".join(_line(f).rstrip(b"\n") for f in features)
    path.write_bytes(b'{"type":"FeatureCollection","features":[\n' + body + b"\n]}\n")


def write_samples(out_dir: str | os.PathLike[str], scenario: Scenario | None = None
                  ) -> list[Path]:
    """Write the sample files into ``out_dir`` (created if missing); returns their paths.

    Raises:
        LivematchError: when a file cannot be written (naming it).
    """
    out = Path(out_dir)
    town = scenario.town if scenario is not None else build_town()
    scenario = scenario or build_scenario(town)
    paths = [out / name for name in SAMPLE_FILES]
    log, truth, network, routes, fences = paths
    try:
        out.mkdir(parents=True, exist_ok=True)
        _write_gzip_lines(log, ({"at": m.at, "topic": m.topic, "payload": m.payload}
                                for m in scenario.messages()))
        _write_gzip_lines(truth, scenario.truth_records())
        _write_collection(network, roads_geojson(town))
        _write_collection(routes, scenario.routes_geojson())
        _write_collection(fences, scenario.fences_geojson())
    except OSError as exc:
        raise LivematchError(f"cannot write sample files into {str(out)!r}: {exc}") from exc
    return paths


def main(argv: Sequence[str] | None = None) -> int:
    """Write the samples into the directory given (default ``replay_logs``)."""
    args = list(sys.argv[1:] if argv is None else argv)
    if len(args) > 1 or (args and args[0].startswith("-")):
        print("usage: python -m livematch.demo.samples [DIR]", file=sys.stderr)
        return 2
    paths = write_samples(args[0] if args else "replay_logs")
    for p in paths:
        print(f"{p} {p.stat().st_size} bytes")
    return 0


if __name__ == "__main__":
    sys.exit(main())
