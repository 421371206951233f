"""Benchmark: what a worker process holds before its first vehicle (the fixed base).

Run: ``.venv/bin/python bench/baserss.py [--extract helsinki] [--name STEM] [--out DIR]``

The memory target (100,000 vehicles in 1 GB resident) is read on the whole process, so
the base every worker pays once decides how many bytes a vehicle may take:
``(1 GiB - base) / 100,000``. This script starts as a worker does and reads
``/proc/self/status`` after each stage: the interpreter; numpy and numba imported;
livematch imported; the matcher's kernels loaded from numba's disk cache (as
``livematch warm`` leaves it; the first load pays numba's code generator and its
runtime, the others each kernel's own code and bookkeeping, read around every
``Cache.load_overload`` numba makes) or, with the kernels compiled ahead of time by the
install (``livematch/core/_jit.py``; ``LIVEMATCH_KERNELS=jit`` measures the JIT), their
extension loaded and numba never imported; the road network read; a
:class:`~livematch.pipeline.Pipeline` built and one vehicle driven 60 s through it.
Each stage is reported as resident (``VmRSS``) and split into anonymous memory
(``RssAnon``: the process's own) and file-backed pages (``RssFile``: shared libraries'
code and data mapped from disk, shared by every worker on the machine and reclaimable
under pressure). Run it after ``livematch warm`` (or any earlier run) so the kernels
load rather than compile: the report says how many compiled.

Results: ``bench/results/baserss.md`` / ``.json`` (``baserss.STEM.*`` with ``--name``).
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(Path(__file__).resolve().parent))
FIELDS = ("VmRSS", "RssAnon", "RssFile")


def status_mb() -> dict[str, float]:
    """VmRSS, RssAnon and RssFile of this process, MB (/proc/self/status, kB / 1024)."""
    out: dict[str, float] = {}
    with open("/proc/self/status", encoding="ascii") as f:
        for line in f:
            key = line.split(":", 1)[0]
            if key in FIELDS:
                out[key] = round(int(line.split()[1]) / 1024, 1)
    return out


def measure(extract: str) -> dict[str, Any]:
    """The stages above, in one process (imports done here, in order)."""
    stages: list[dict[str, Any]] = [{"stage": "interpreter", **status_mb()}]
    import numpy  # noqa: F401

    from livematch.core import _jit

    aot = _jit.mode() == "aot"  # the kernels compiled ahead of time: numba never imported
    version = "not imported (kernels compiled ahead of time)"
    if not aot:
        import numba
        from numba.core import caching

        version = numba.__version__
    stages.append({"stage": "numpy imported" if aot else "numpy and numba imported",
                   **status_mb()})
    import livematch.pipeline
    from livematch.commands.warm import kernel_counts

    stages.append({"stage": "livematch imported", **status_mb()})
    loads: list[float] = []
    if not aot:
        original = caching.Cache.load_overload

        def timed_load(self: Any, sig: Any, target_context: Any) -> Any:
            before = status_mb()["VmRSS"]
            got = original(self, sig, target_context)
            loads.append(round(status_mb()["VmRSS"] - before, 2))
            return got

        caching.Cache.load_overload = timed_load  # type: ignore[method-assign]
    started = time.perf_counter()
    livematch.pipeline.prepare_kernels()
    kernel_s = time.perf_counter() - started
    if not aot:
        caching.Cache.load_overload = original  # type: ignore[method-assign]
    compiled, loaded = kernel_counts()
    stages.append({"stage": "kernels ready", **status_mb()})
    from _drives import drive_fixes, load_extract

    network = load_extract(extract)
    stages.append({"stage": f"network read ({extract})", **status_mb()})
    from livematch.core.settings import MatchSettings

    pipe = livematch.pipeline.Pipeline(network, MatchSettings())
    fixes = drive_fixes(network, 1, 60.0, [20261205, 1])[0]
    lon, lat = network.projection.to_lonlat([f.x for f in fixes], [f.y for f in fixes])
    for fix, x, y in zip(fixes, lon.tolist(), lat.tolist(), strict=True):
        payload = json.dumps({"vehicle": "base-1", "time": fix.t, "lat": y, "lon": x})
        pipe.handle("fleet/base-1", payload.encode(), fix.t)
    stages.append({"stage": "pipeline built, one vehicle driven 60 s", **status_mb()})
    return {"numba": version, "kernels": _jit.mode(), "stages": stages,
            "kernel_loads_mb": loads,
            "kernels_compiled": compiled, "kernels_loaded": loaded,
            "kernels_s": round(kernel_s, 2)}


def report(result: dict[str, Any]) -> str:
    """The Markdown report."""
    lines = [f"# A worker's fixed base ({result['extract']})", "",
             f"Command: `.venv/bin/python {result['command']}`, started "
             f"{result['started_utc']} UTC, livematch at commit {result['commit']}, "
             f"1-minute load {result['load']}, numba {result['numba']}.", "",
             "| stage | resident MB | anonymous MB | file-backed MB |",
             "|---|---:|---:|---:|"]
    for s in result["stages"]:
        lines.append(f"| {s['stage']} | {s['VmRSS']} | {s['RssAnon']} | {s['RssFile']} |")
    loads = result["kernel_loads_mb"]
    if result.get("kernels") == "aot":
        lines += ["", "Kernels: compiled ahead of time by the install "
                  "(`livematch.core._aot_kernels`), ready in "
                  f"{result['kernels_s']} s; numba not imported."]
    else:
        lines += ["", f"Kernels: {result['kernels_loaded']} loaded from numba's cache, "
                  f"{result['kernels_compiled']} compiled, in {result['kernels_s']} s; "
                  f"{len(loads)} cache loads, the first +{loads[0] if loads else 0} MB "
                  "resident (numba's code generator and runtime start with it), the other "
                  f"{max(0, len(loads) - 1)} +{sum(loads[1:]):.1f} MB together."]
    last = result["stages"][-1]
    for label, base in (("resident", last["VmRSS"]), ("anonymous", last["RssAnon"])):
        per = (1024 - base) / 100_000 * 1024
        lines.append(f"- With this {label} base ({base} MB), 100,000 vehicles fit in "
                     f"1 GiB at {per:.2f} KB a vehicle or less.")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--extract", default="helsinki", choices=("helsinki", "test"))
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"))
    ap.add_argument("--name", default=None, metavar="STEM",
                    help="write baserss.STEM.md / .json instead of baserss.md / .json")
    args = ap.parse_args(argv)
    started = time.strftime("%Y-%m-%d %H:%M", time.gmtime())
    with open("/proc/loadavg", encoding="ascii") as f:
        load = f.read().split()[0]
    commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT,
                            capture_output=True, text=True, check=False).stdout.strip()
    result = {"command": " ".join(["bench/baserss.py", *sys.argv[1:]]),
              "started_utc": started, "commit": commit, "load": load,
              "extract": args.extract, **measure(args.extract)}
    text = report(result)
    print(text)
    base = "baserss" if args.name is None else f"baserss.{args.name}"
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / f"{base}.md").write_text(text, encoding="utf-8")
    (out / f"{base}.json").write_text(json.dumps(result, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
