"""Benchmark: end-to-end load through a real broker, against the broker's own ceiling.

Run: ``.venv/bin/python bench/load.py [--vehicles 250,500,1000,2000] [--seconds 15]
[--systems relay,livematch-1,livematch-2]``

For every system and every fleet size N, on this machine and loopback only:

- a fresh ``mosquitto`` on a free loopback port (and a fresh ``redis-server`` for the
  two-worker group);
- a **load generator** in its own process publishing N vehicles at 1 Hz each (QoS 1),
  positions from simulated drives on the invented demo town, each fix stamped with the
  wall-clock time it is published;
- the **system under test**: ``relay`` (a bare relay on the same MQTT client library:
  subscribe, decode the JSON, publish it on an output topic; no matching — the ceiling),
  ``livematch-1`` (``livematch run``, memory store) or ``livematch-2`` (two
  ``livematch run --group`` workers sharing the fleet through Redis shard leases);
- a **subscriber** in this process timing every output against the fix time it carries.

Reported per run: offered and delivered messages per second (outputs per fix: one
assignment, or one relayed message), the share delivered, and the latency from fix time
to output received, p50 / p99. "Sustained" = delivered at least 99 % of the fixes within
the run plus 5 s. The two-worker rows matter only on a machine with spare cores.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import json
import os
import shutil
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
NETWORK = ROOT / "replay_logs" / "larkmoor.geojson"
IN_FLIGHT = 256  # QoS 1 publishes awaiting their PUBACK at once (generator and relay)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_port(port: int, timeout: float = 10.0) -> None:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        with socket.socket() as s:
            if s.connect_ex(("127.0.0.1", port)) == 0:
                return
        time.sleep(0.05)
    raise RuntimeError(f"nothing listens on 127.0.0.1:{port}")


def start_mosquitto(folder: Path) -> tuple[subprocess.Popen[bytes], int]:
    port = free_port()
    conf = folder / "mosquitto.conf"
    conf.write_text(f"listener {port} 127.0.0.1\nallow_anonymous true\n"
                    "max_queued_messages 1000000\nmax_inflight_messages 1000\n"
                    f"user {os.environ.get('USER') or 'root'}\n", encoding="utf-8")
    exe = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
    proc = subprocess.Popen([exe, "-c", str(conf)], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    wait_port(port)
    return proc, port


def start_redis(folder: Path) -> tuple[subprocess.Popen[bytes], int]:
    port = free_port()
    proc = subprocess.Popen(["redis-server", "--port", str(port), "--bind", "127.0.0.1",
                             "--save", "", "--appendonly", "no", "--dir", str(folder)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    wait_port(port)
    return proc, port


# ------------------------------------------------------------------ the generator role
def drives(n: int, seconds: int) -> list[list[tuple[float, float]]]:
    """Per vehicle, ``seconds`` WGS84 positions one second apart along the demo town."""
    import numpy as np

    from livematch.mapdata.netfile import open_network
    from livematch.sim.drive import DriveSettings, drivable_segments, simulate_drive

    net = open_network(str(NETWORK))
    allowed = drivable_segments(net)
    out = []
    for i in range(n):
        d = simulate_drive(net, np.random.default_rng([77, i]), f"v{i}", 0.0,
                           DriveSettings(duration_s=float(seconds)), allowed)
        xs = [p.x + e[0] for p, e in zip(d.truth, d.error_xy, strict=False)]
        ys = [p.y + e[1] for p, e in zip(d.truth, d.error_xy, strict=False)]
        lon, lat = net.projection.to_lonlat(xs, ys)
        out.append(list(zip(lon.tolist(), lat.tolist(), strict=True)))
    return out


async def generate(port: int, n: int, seconds: int, topic: str) -> None:
    import aiomqtt

    tracks = drives(n, seconds + 1)
    inflight = asyncio.Semaphore(IN_FLIGHT)
    pending: set[asyncio.Task[None]] = set()
    async with aiomqtt.Client("127.0.0.1", port, identifier=f"gen-{os.getpid()}",
                              max_queued_outgoing_messages=0) as client:
        start = time.time() + 0.5
        for k in range(seconds):
            for i in range(n):
                # spread the N vehicles evenly over each second
                at = start + k + i / n
                delay = at - time.time()
                if delay > 0:
                    await asyncio.sleep(delay)
                lon, lat = tracks[i][k]
                payload = json.dumps({"vehicle": f"v{i}", "time": round(time.time(), 3),
                                      "lat": lat, "lon": lon, "accuracy": 5.0})
                await inflight.acquire()  # QoS 1: many in flight, not one round trip each
                task = asyncio.create_task(
                    client.publish(topic.replace("+", f"v{i}"), payload, qos=1))
                task.add_done_callback(lambda _t: inflight.release())
                pending.add(task)
                task.add_done_callback(pending.discard)
        await asyncio.gather(*pending)


# ------------------------------------------------------------------- the relay role
async def relay(port: int, topic: str) -> None:
    import aiomqtt
    import msgspec

    async with aiomqtt.Client("127.0.0.1", port, identifier=f"relay-{os.getpid()}") as client:
        await client.subscribe(topic, qos=1)
        inflight = asyncio.Semaphore(IN_FLIGHT)
        pending: set[asyncio.Task[None]] = set()
        async for message in client.messages:
            record = msgspec.json.decode(message.payload)  # the ceiling still decodes
            await inflight.acquire()
            task = asyncio.create_task(client.publish(
                f"relay/out/{record['vehicle']}", msgspec.json.encode(record), qos=1))
            task.add_done_callback(lambda _t: inflight.release())
            pending.add(task)
            task.add_done_callback(pending.discard)


# --------------------------------------------------------------------------- one run
def daemon_config(folder: Path, port: int, store: str, worker: str, group: str) -> Path:
    cfg = folder / f"{worker}.toml"
    group_lines = f'[group]\nname = "{group}"\nworker = "{worker}"\nlease_s = 5\n' if group else ""
    cfg.write_text(f"""
[inputs]
network = "{NETWORK}"

[mqtt]
url = "mqtt://127.0.0.1:{port}"
topic = "fleet/+/position"
client_id = "load-{worker}"
control_topic = ""

[store]
url = "{store}"
key_prefix = "load:"

[metrics]
listen = ""

[log]
level = "warning"
{group_lines}""", encoding="utf-8")
    return cfg


async def collect(port: int, topic: str, expected: int, deadline: float) -> list[float]:
    import aiomqtt

    latencies: list[float] = []
    async with aiomqtt.Client("127.0.0.1", port, identifier=f"sub-{os.getpid()}") as client:
        await client.subscribe(topic, qos=1)
        with contextlib.suppress(TimeoutError):
            async with asyncio.timeout(max(0.0, deadline - time.time())):
                async for message in client.messages:
                    now = time.time()
                    record = json.loads(message.payload)
                    latencies.append(now - float(record["time"]))
                    if len(latencies) >= expected:
                        break
    return latencies


def run_one(system: str, n: int, seconds: int) -> dict[str, Any]:
    folder = Path(tempfile.mkdtemp(prefix="lm-load-"))
    procs: list[subprocess.Popen[bytes]] = []
    try:
        broker, port = start_mosquitto(folder)
        procs.append(broker)
        env = dict(os.environ)
        if system == "relay":
            out_topic = "relay/out/#"
            procs.append(subprocess.Popen([sys.executable, __file__, "--role", "relay",
                                           "--port", str(port)], env=env))
        else:
            out_topic = "livematch/match/#"
            workers = 2 if system == "livematch-2" else 1
            store, group = "memory://", ""
            if workers == 2:
                redis, rport = start_redis(folder)
                procs.append(redis)
                store, group = f"redis://127.0.0.1:{rport}/0", "load"
            for w in range(workers):
                cfg = daemon_config(folder, port, store, f"w{w}", group)
                procs.append(subprocess.Popen([sys.executable, "-m", "livematch.cli", "run",
                                               "--config", str(cfg)], env=env))
        time.sleep(4.0 if system != "relay" else 1.0)  # map load, leases
        expected = n * seconds
        deadline = time.time() + seconds + 8.0
        gen = subprocess.Popen([sys.executable, __file__, "--role", "generator", "--port",
                                str(port), "--n", str(n), "--seconds", str(seconds)], env=env)
        procs.append(gen)
        latencies = asyncio.run(collect(port, out_topic, expected, deadline))
        gen.wait(timeout=30)
    finally:
        for p in reversed(procs):
            p.terminate()
        for p in procs:
            with contextlib.suppress(subprocess.TimeoutExpired):
                p.wait(timeout=15)
        shutil.rmtree(folder, ignore_errors=True)
    latencies.sort()

    def pct(q: float) -> float | None:
        return round(latencies[int(q * (len(latencies) - 1))] * 1000, 1) if latencies else None

    share = len(latencies) / expected if expected else 0.0
    return {"system": system, "vehicles": n, "offered_per_s": n,
            "delivered_per_s": round(len(latencies) / seconds, 1),
            "delivered_share": round(share, 4), "p50_ms": pct(0.5), "p99_ms": pct(0.99),
            "sustained": share >= 0.99}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--role", choices=("bench", "generator", "relay"), default="bench")
    ap.add_argument("--port", type=int, default=0)
    ap.add_argument("--n", type=int, default=0)
    ap.add_argument("--vehicles", default="250,500,1000,2000")
    ap.add_argument("--seconds", type=int, default=15)
    ap.add_argument("--systems", default="relay,livematch-1,livematch-2")
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"))
    args = ap.parse_args(argv)
    if args.role == "generator":
        asyncio.run(generate(args.port, args.n, args.seconds, "fleet/+/position"))
        return 0
    if args.role == "relay":
        with contextlib.suppress(KeyboardInterrupt):
            asyncio.run(relay(args.port, "fleet/+/position"))
        return 0
    rows = []
    for system in args.systems.split(","):
        for n in (int(v) for v in args.vehicles.split(",")):
            row = run_one(system, n, args.seconds)
            print(json.dumps(row), flush=True)
            rows.append(row)
    lines = [
        "# End-to-end load through mosquitto on loopback",
        "",
        f"Command: `bench/load.py --vehicles {args.vehicles} --seconds {args.seconds} "
        f"--systems {args.systems}`; {os.cpu_count()} cores shared by the broker, the "
        "generator, the subscriber and the system under test. Each vehicle sends one fix "
        "per second (QoS 1); latency is from the fix's own time to its output arriving at "
        "the subscriber.",
        "",
        "| system | vehicles (fixes/s offered) | delivered/s | delivered | p50 ms | p99 ms "
        "| sustained |",
        "|---|---:|---:|---:|---:|---:|---|",
    ]
    for r in rows:
        lines.append(f"| {r['system']} | {r['vehicles']} | {r['delivered_per_s']} | "
                     f"{r['delivered_share']:.1%} | {r['p50_ms']} | {r['p99_ms']} | "
                     f"{'yes' if r['sustained'] else 'no'} |")
    text = "\n".join(lines) + "\n"
    print(text)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "load.md").write_text(text, encoding="utf-8")
    (out / "load.json").write_text(json.dumps(rows, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
