"""``livematch run`` as a subprocess: SIGTERM mid-feed, restart, nothing lost, state kept."""

from __future__ import annotations

import asyncio
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import redis
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

pytest_plugins = ("fixtures_services",)

SECRET = "s3cr3t-never-logged"


def start_daemon(config: Path, log_path: Path) -> subprocess.Popen[bytes]:
    env = subprocess_env()
    env["LIVEMATCH_MQTT_USERNAME"] = "fleet-daemon"
    env["LIVEMATCH_MQTT_PASSWORD"] = SECRET
    with log_path.open("ab") as log:
        return subprocess.Popen([sys.executable, "-m", "livematch.cli", "run",
                                 "--config", str(config)],
                                stdout=log, stderr=log, env=env)


async def wait_ready(port: int, proc: subprocess.Popen[bytes], timeout: float = 60.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        assert proc.poll() is None, f"daemon exited with {proc.returncode}"
        try:
            if (await http_get(port, "/readyz"))[0] == 200:
                return
        except OSError:
            pass
        await asyncio.sleep(0.1)
    raise AssertionError(f"daemon not ready after {timeout} s")


async def test_run_sigterm_restart_loses_nothing_and_restores_state(
        mosquitto: Mosquitto, redis_server: RedisServer, prefix: str, tmp_path: Path) -> None:
    """SIGTERM mid-feed, fixes published while down, restart: every fix matched once,
    vehicle state restored from Redis (the certificate window keeps growing)."""
    net_path = tmp_path / "town.lmnet"
    save_network(town(), net_path)
    metrics_port = free_port()
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url, store=redis_server.url,
                       network=str(net_path), metrics=f"127.0.0.1:{metrics_port}")
    log_path = tmp_path / "daemon.log"
    vehicles = ["bus-1", "bus-2"]
    feeds = {v: drive(v, 60, start_x=300.0 + 900 * k) for k, v in enumerate(vehicles)}

    def batch(lo: int, hi: int) -> list[tuple[str, bytes]]:
        return [(f"{prefix}/fleet/{v}/position", feeds[v][i][1])
                for i in range(lo, hi) for v in vehicles]

    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col:
        proc = start_daemon(cfg, log_path)
        try:
            await wait_ready(metrics_port, proc)
            async with publisher(mosquitto.port) as pub:
                for topic, payload in batch(0, 20):
                    await pub.publish(topic, payload, qos=1)
                await col.wait_for("/out/match/", 40)
                for topic, payload in batch(20, 30):
                    await pub.publish(topic, payload, qos=1)
                proc.send_signal(signal.SIGTERM)  # mid-feed
                for topic, payload in batch(30, 60):
                    await pub.publish(topic, payload, qos=1)
            code = await asyncio.to_thread(proc.wait, 30)
            assert code == 0
            store = redis.Redis.from_url(redis_server.url)
            assert sorted(store.hkeys(f"{prefix}:latest")) == [b"bus-1", b"bus-2"]
            for v in vehicles:
                assert store.exists(f"{prefix}:vehicle:{v}")
            before = len(col.records("/out/match/"))
            assert before < 120  # some fixes were left to the next run

            proc = start_daemon(cfg, log_path)
            await wait_ready(metrics_port, proc)
            want = {v: {t for t, _ in feeds[v]} for v in vehicles}
            deadline = time.monotonic() + 60
            while any({a["time"] for a in col.records(f"/out/match/{v}")} != want[v]
                      for v in vehicles):
                assert time.monotonic() < deadline, "fixes missing after the restart"
                await asyncio.sleep(0.1)
        finally:
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
                assert await asyncio.to_thread(proc.wait, 30) == 0
    for v in vehicles:
        by_time = {a["time"]: a for a in col.records(f"/out/match/{v}")}
        assert sorted(by_time) == sorted(want[v])  # no fix lost
        # The window continued across the restart: fix i is certified with i+1 fixes.
        assert [by_time[t]["window_fixes"] for t in sorted(by_time)] == list(range(1, 61))
    log_text = log_path.read_text()
    assert re.search(r'event="state restored" .*vehicles=2$', log_text, re.MULTILINE)
    assert SECRET not in log_text
