"""Two ``livematch run --group`` worker processes; one is SIGKILLed mid-feed."""

from __future__ import annotations

import asyncio
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import msgspec
import redis.asyncio as aioredis
from prometheus_client.parser import text_string_to_metric_families
from services import (
    Collector,
    Mosquitto,
    RedisServer,
    drive,
    free_port,
    http_get,
    publisher,
    subprocess_env,
    town,
    write_config,
)

from livematch.mapdata.netfile import save_network
from livematch.pipeline import STATE_MAGIC

pytest_plugins = ("fixtures_services",)

SHARDS = 8


def start_worker(config: Path, worker: str, metrics_port: int,
                 log_path: Path) -> subprocess.Popen[bytes]:
    with log_path.open("ab") as log:
        return subprocess.Popen(
            [sys.executable, "-m", "livematch.cli", "run", "--config", str(config),
             "--group", "g", "--shards", str(SHARDS), "--worker", worker,
             "--metrics", f"127.0.0.1:{metrics_port}"],
            stdout=log, stderr=log, env=subprocess_env())


async def metric(port: int, name: str) -> float:
    """The value of one unlabelled metric of a worker (or -1 when unreachable)."""
    try:
        status, body = await http_get(port, "/metrics")
    except OSError:
        return -1.0
    assert status == 200
    for family in text_string_to_metric_families(body):
        for sample in family.samples:
            if sample.name == name:
                return float(sample.value)
    return -1.0


async def checkpoint_times(client: aioredis.Redis, prefix: str) -> dict[str, float]:
    """Each vehicle's newest fix time in its Redis checkpoint (the blob's recent times)."""
    out: dict[str, float] = {}
    async for key in client.scan_iter(match=f"{prefix}:{{s:*}}:vehicle:*", count=500):
        blob = await client.get(key)
        if blob is None:
            continue
        assert blob.startswith(STATE_MAGIC)
        vehicle, recent, _tracker, _alerts = msgspec.msgpack.decode(blob[len(STATE_MAGIC) + 1:])
        out[vehicle] = max(recent)
    return out


async def watch_checkpoints(client: aioredis.Redis, prefix: str, seen: dict[str, float],
                            backwards: list[str]) -> None:
    """Poll every vehicle's checkpoint time until cancelled; note in ``backwards`` each
    that went back (a restored state older than one already written)."""
    while True:
        for v, t in (await checkpoint_times(client, prefix)).items():
            if t < seen.get(v, t):
                backwards.append(f"{v}: {seen[v]} -> {t}")
            seen[v] = max(t, seen.get(v, t))
        await asyncio.sleep(0.05)


async def test_sigkill_one_worker_every_fix_answered_no_state_backwards(
        mosquitto: Mosquitto, redis_server: RedisServer, prefix: str, tmp_path: Path) -> None:
    """Two workers share 8 shards; one is SIGKILLed mid-feed. The other takes its shards
    over (restore + replay of the fixes it kept): every published fix gets an
    assignment, no checkpoint ever goes back in fix time, and every answer of a fix
    carries the same certificate window (the state continued, not restarted)."""
    logs, taken_over = await scenario(mosquitto, redis_server, prefix, tmp_path, "kill")
    assert taken_over < 10.0  # lease 2 s + a renewal period + restore, with room for a slow CI
    assert "shard taken" in logs["w2"].read_text()


async def test_stalled_worker_is_fenced_and_rejoins(
        mosquitto: Mosquitto, redis_server: RedisServer, prefix: str, tmp_path: Path) -> None:
    """One worker is frozen (SIGSTOP) past its leases mid-feed and then resumes: the
    other takes its shards; the resumed worker drops them instead of writing its stale
    state, and the two split the shards again. Every fix answered, no state backwards."""
    logs, taken_over = await scenario(mosquitto, redis_server, prefix, tmp_path, "stop")
    assert taken_over < 10.0
    w1 = logs["w1"].read_text()
    assert re.search(r'event="shard lost" shard=\d+ why=(expired|fenced|taken)', w1), w1
    assert "shard taken" in logs["w2"].read_text()


async def scenario(mosquitto: Mosquitto, redis_server: RedisServer, prefix: str,
                   tmp_path: Path, mode: str) -> tuple[dict[str, Path], float]:
    """Run two workers, disturb w1 after fix 20 (``kill``: SIGKILL; ``stop``: SIGSTOP
    for 4 s, then SIGCONT), check every fix and every checkpoint; (logs, takeover s)."""
    net_path = tmp_path / "town.lmnet"
    save_network(town(), net_path)
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url, store=redis_server.url,
                       network=str(net_path), extra="[group]\nlease_s = 2.0\n")
    ports = {"w1": free_port(), "w2": free_port()}
    logs = {w: tmp_path / f"{w}.log" for w in ports}
    vehicles = [f"car-{i}" for i in range(10)]
    n_fixes = 50
    feeds = {v: drive(v, n_fixes, start_x=100.0 + 400 * i) for i, v in enumerate(vehicles)}
    client = aioredis.Redis.from_url(redis_server.url)
    backwards: list[str] = []
    seen: dict[str, float] = {}

    async def held() -> list[float]:
        return [await metric(p, "livematch_shards_held") for p in ports.values()]

    procs = {w: start_worker(cfg, w, ports[w], logs[w]) for w in ports}
    watcher = asyncio.create_task(watch_checkpoints(client, prefix, seen, backwards))
    try:
        async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col:
            deadline = time.monotonic() + 60
            while await held() != [4, 4]:
                assert time.monotonic() < deadline, "workers did not split the shards"
                for w, proc in procs.items():
                    assert proc.poll() is None, logs[w].read_text()
                await asyncio.sleep(0.2)
            disturbed_at = 0.0
            taken_over: float | None = None
            async with publisher(mosquitto.port) as pub:
                for i in range(n_fixes):
                    for v in vehicles:
                        await pub.publish(f"{prefix}/fleet/{v}/position", feeds[v][i][1], qos=1)
                    if i == 20:
                        disturbed_at = time.monotonic()
                        if mode == "kill":
                            procs["w1"].send_signal(signal.SIGKILL)  # mid-feed, no goodbye
                            await asyncio.to_thread(procs["w1"].wait, 10)
                        else:
                            procs["w1"].send_signal(signal.SIGSTOP)  # frozen, leases run out
                    if (mode == "stop" and taken_over is None and disturbed_at
                            and await metric(ports["w2"], "livematch_shards_held") == 8):
                        taken_over = time.monotonic() - disturbed_at
                    await asyncio.sleep(0.1)
            want = {v: {t for t, _ in feeds[v]} for v in vehicles}
            deadline = time.monotonic() + 60
            while True:
                got = {v: {r["time"] for r in col.records(f"/out/match/{v}")} for v in vehicles}
                if taken_over is None and await metric(ports["w2"], "livematch_shards_held") == 8:
                    taken_over = time.monotonic() - disturbed_at
                if mode == "stop" and taken_over is not None and procs["w1"].poll() is None:
                    procs["w1"].send_signal(signal.SIGCONT)  # wakes with stale leases
                if got == want and taken_over is not None:
                    break
                missing = sum(len(want[v] - got[v]) for v in vehicles)
                assert time.monotonic() < deadline, f"{missing} fixes never answered"
                await asyncio.sleep(0.1)
            if mode == "stop":  # the resumed worker rejoins: the shares even out again
                deadline = time.monotonic() + 30
                while await held() != [4, 4]:
                    assert time.monotonic() < deadline, f"no rebalance: {await held()}"
                    await asyncio.sleep(0.2)
            # the checkpoints catch up with the last fix of every vehicle
            deadline = time.monotonic() + 20
            while seen != {v: max(want[v]) for v in vehicles}:
                assert time.monotonic() < deadline, f"checkpoints lag: {seen}"
                await asyncio.sleep(0.1)
            for w, proc in procs.items():
                if proc.poll() is None:
                    proc.send_signal(signal.SIGTERM)
                    assert await asyncio.to_thread(proc.wait, 30) == 0, w
    finally:
        watcher.cancel()
        for proc in procs.values():
            if proc.poll() is None:
                proc.send_signal(signal.SIGCONT)
                proc.kill()
                proc.wait()
        await client.aclose()
    assert backwards == []
    for v in vehicles:
        windows = col.windows(f"/out/match/{v}")
        # one window per fix, even when two workers answered it; it grows 1, 2, 3, ...
        assert windows == [{k} for k in range(1, n_fixes + 1)], v
    assert taken_over is not None
    return logs, taken_over
