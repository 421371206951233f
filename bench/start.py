"""Benchmark: a worker's start on a cold and a warmed numba cache, probed like an orchestrator.

Run: ``.venv/bin/python bench/start.py [--interval 0.1] [--out bench/results]``

Three starts of ``livematch run`` (memory store, a fresh mosquitto on loopback, the demo
town's network), each with a numba cache directory of its own (``NUMBA_CACHE_DIR``), so
the cache beside the sources is neither used nor changed:

1. **cold**: an empty cache directory: the worker compiles its kernels;
2. **warm**: a second empty directory, filled first by ``livematch warm`` (its wall time,
   CPU and the kernels it compiled are reported), then the worker starts;
3. **again**: the worker starts once more on the cold run's directory (filled by it).

While a worker starts, ``/healthz`` and ``/readyz`` are requested every ``--interval``
seconds (one connection each, 5 s timeout, as a probe would). Reported per start: when
the health port first answered, every ``/healthz`` status, the slowest answer and when
it came, how many took 0.5 s or more (a probe's timeout is often 1 s), the
``/readyz`` bodies in order with when each first appeared, when ``/readyz`` turned 200,
and the worker's CPU seconds by then (/proc/<pid>/stat); plus the 1-minute load average
before the start. Results: ``bench/results/start.md`` and ``start.json``. The workers
run the kernels under numba's JIT (``LIVEMATCH_KERNELS=jit``); ``--kernels installed``
starts them as installed, with the kernels compiled ahead of time when the install built
them (``core/_jit.py``).
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))
from load import (  # bench/load.py: the broker and process helpers
    cpu_seconds,
    daemon_config,
    free_port,
    git_state,
    load_average,
    start_mosquitto,
    stop_all,
)

ROOT = Path(__file__).resolve().parent.parent
READY_TIMEOUT_S = 600.0


def get(port: int, path: str, timeout: float = 5.0) -> tuple[int, str, float] | None:
    """(status, body, seconds taken) of one GET; None when nothing listens."""
    started = time.monotonic()
    try:
        with socket.create_connection(("127.0.0.1", port), timeout=timeout) as s:
            s.sendall(f"GET {path} HTTP/1.1\r\nHost: x\r\n\r\n".encode())
            raw = b""
            while chunk := s.recv(4096):
                raw += chunk
    except OSError:
        return None
    head, _, body = raw.partition(b"\r\n\r\n")
    return int(head.split()[1]), body.decode().strip(), time.monotonic() - started


#: ``LIVEMATCH_KERNELS`` for the workers and ``livematch warm`` (``--kernels``; default
#: ``jit``: the starts this benchmark was made for; ``""``: as installed, ahead of time)
KERNELS = {"value": "jit"}


def start_worker(cache: Path, broker_port: int, folder: Path, interval: float
                 ) -> dict[str, Any]:
    """Start one worker with ``cache`` as numba's cache, probe it until ready, stop it."""
    port = free_port()
    cfg = daemon_config(folder, broker_port, "memory://", f"start{port}", "",
                        metrics_port=port)
    env = {k: v for k, v in os.environ.items() if not k.startswith("LIVEMATCH")}
    env["NUMBA_CACHE_DIR"] = str(cache)
    env["LIVEMATCH_KERNELS"] = KERNELS["value"]
    load = load_average()
    t0 = time.monotonic()
    proc = subprocess.Popen([sys.executable, "-m", "livematch.cli", "run", "--config",
                             str(cfg)], env=env, cwd=ROOT)
    first_answer = ready_at = cpu_at_ready = None
    health: dict[int, int] = {}
    slowest, slowest_at, slow = 0.0, 0.0, 0  # slowest /healthz, when, how many >= 0.5 s
    refused = 0
    stages: list[tuple[str, float]] = []
    try:
        while time.monotonic() - t0 < READY_TIMEOUT_S:
            if proc.poll() is not None:
                raise RuntimeError(f"worker exited with {proc.returncode}")
            h = get(port, "/healthz")
            r = get(port, "/readyz")
            now = time.monotonic() - t0
            if h is None:
                refused += first_answer is not None  # refused after the port had opened
            else:
                first_answer = first_answer if first_answer is not None else now
                health[h[0]] = health.get(h[0], 0) + 1
                slow += h[2] >= 0.5
                if h[2] > slowest:
                    slowest, slowest_at = h[2], now
            if r is not None:
                if not stages or stages[-1][0] != r[1]:
                    stages.append((r[1], round(now, 2)))
                if r[0] == 200:
                    ready_at, cpu_at_ready = now, cpu_seconds(proc.pid)
                    break
            time.sleep(interval)
    finally:
        proc.send_signal(signal.SIGTERM)
        code = proc.wait(timeout=60)
    return {"load_avg_1m": load, "port_open_s": round(first_answer or -1, 2),
            "healthz_statuses": health, "healthz_refused_after_open": refused,
            "healthz_slowest_ms": round(slowest * 1000, 1),
            "healthz_slowest_at_s": round(slowest_at, 1), "healthz_over_500ms": slow,
            "readyz": stages,
            "ready_s": round(ready_at, 1) if ready_at is not None else None,
            "cpu_s_at_ready": round(cpu_at_ready, 1) if cpu_at_ready is not None else None,
            "exit_code": code}


def warm(cache: Path) -> dict[str, Any]:
    env = dict(os.environ, NUMBA_CACHE_DIR=str(cache), LIVEMATCH_KERNELS=KERNELS["value"])
    started = time.monotonic()
    done = subprocess.run([sys.executable, "-m", "livematch.cli", "warm"], env=env, cwd=ROOT,
                          capture_output=True, text=True, check=True)
    return {"wall_s": round(time.monotonic() - started, 1), "output": done.stdout.strip()}


def render(r: dict[str, Any]) -> str:
    lines = ["# A worker's start, cold and warmed numba cache", "",
             f"Command: `.venv/bin/python bench/start.py --interval {r['interval']}"
             f" --kernels {r.get('kernels', 'jit')}`, "
             f"started {r['started_utc']} UTC, livematch at commit {r['git']['commit']}; "
             f"{os.cpu_count()} cores shared with other people's work. `livematch warm` "
             f"into the warm run's empty cache: {r['warm']['wall_s']} s wall, "
             f"`{r['warm']['output']}`.", "",
             "| start | load avg | port open s | /healthz answers | slowest /healthz ms (at s) "
             "| /healthz >= 0.5 s | /readyz bodies (first seen, s) | ready s | CPU s at ready "
             "| exit |",
             "|---|---:|---:|---|---:|---:|---|---:|---:|---:|"]
    for name in ("cold", "warm", "again"):
        s = r[name]
        bodies = "; ".join(f"{b} ({t})" for b, t in s["readyz"])
        answers = ", ".join(f"{k}: {v}" for k, v in sorted(s["healthz_statuses"].items()))
        if s["healthz_refused_after_open"]:
            answers += f", refused: {s['healthz_refused_after_open']}"
        lines.append(f"| {name} | {s['load_avg_1m']} | {s['port_open_s']} | {answers} | "
                     f"{s['healthz_slowest_ms']} ({s['healthz_slowest_at_s']}) | "
                     f"{s['healthz_over_500ms']} | {bodies} | {s['ready_s']} | "
                     f"{s['cpu_s_at_ready']} | {s['exit_code']} |")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n", 1)[0])
    ap.add_argument("--interval", type=float, default=0.1, help="seconds between probes")
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"))
    ap.add_argument("--name", default="start")
    ap.add_argument("--kernels", choices=("jit", "installed"), default="jit",
                    help="jit (default): the kernels under numba's JIT, whose cache this "
                    "benchmark is about; installed: as installed (ahead of time when built: "
                    "the three starts then compile nothing)")
    args = ap.parse_args(argv)
    KERNELS["value"] = "jit" if args.kernels == "jit" else ""
    result: dict[str, Any] = {"started_utc": time.strftime("%Y-%m-%d %H:%M", time.gmtime()),
                              "interval": args.interval, "git": git_state(),
                              "kernels": args.kernels}
    with tempfile.TemporaryDirectory(prefix="lm-start-") as tmp:
        folder = Path(tmp)
        broker, port = start_mosquitto(folder)
        try:
            cold, warmed = folder / "cache-cold", folder / "cache-warm"
            result["cold"] = start_worker(cold, port, folder, args.interval)
            print(json.dumps(result["cold"]), flush=True)
            result["warm"] = warm(warmed)
            print(json.dumps(result["warm"]), flush=True)
            result["warm"].update(start_worker(warmed, port, folder, args.interval))
            print(json.dumps(result["warm"]), flush=True)
            result["again"] = start_worker(cold, port, folder, args.interval)
        finally:
            stop_all([broker])
    out = Path(args.out)
    text = render(result)
    print(text)
    (out / f"{args.name}.md").write_text(text, encoding="utf-8")
    (out / f"{args.name}.json").write_text(json.dumps(result, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
