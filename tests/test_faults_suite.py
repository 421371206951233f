"""Fault-injection suite: three worker processes, a killed worker, a broker restart, a
Redis restart and a flood of malformed messages between valid fixes.

Run alone with ``scripts/faults`` (a smaller flood, the default) or ``scripts/faults
--full`` (100,000 malformed messages; ``LIVEMATCH_FAULTS_FLOOD`` sets any size). The
numbers are printed, and written to ``bench/results/faults.md`` when run by the script.
"""

from __future__ import annotations

import asyncio
import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest
import redis.asyncio as aioredis
from prometheus_client.parser import text_string_to_metric_families
from services import (
    Collector,
    Mosquitto,
    drive,
    end_group_run,
    free_port,
    http_get,
    subprocess_env,
    town,
    write_config,
)
from test_faults_group import PersistentRedis
from test_service_shards_failover import checkpoint_times, metric

from livematch.mapdata.netfile import save_network

pytest_plugins = ("fixtures_services",)

pytestmark = pytest.mark.faults

SHARDS = 12
WORKERS = ("w1", "w2", "w3")
VEHICLES = [f"fv-{i}" for i in range(9)]
N_FIXES = 60  # per vehicle, in 4 phases of 15
PHASES = 4
#: Malformed messages in the default run; ``scripts/faults --full`` sets 100,000.
FLOOD = int(os.environ.get("LIVEMATCH_FAULTS_FLOOD", "4000"))
RESULTS = Path(__file__).resolve().parent.parent / "bench" / "results" / "faults.md"


def malformed(rng: random.Random, prefix: str, now: float) -> tuple[str, bytes]:
    """One message that must be rejected, never a valid fix (seeded, reproducible)."""
    vehicle = rng.choice([*VEHICLES, "ghost", "x" * 65, " padded "])
    topic = f"{prefix}/fleet/{vehicle}/position"
    if vehicle not in VEHICLES:  # a bad or unknown id: the payload is still broken
        vehicle = rng.choice(VEHICLES)
        topic = f"{prefix}/fleet/{vehicle}/position"
    good = {"time": 1_780_000_000.0, "lat": 60.17, "lon": 24.94}
    kind = rng.randrange(9)
    if kind == 0:  # random bytes
        payload = bytes(rng.randrange(256) for _ in range(rng.randrange(0, 120)))
        if payload.lstrip().startswith(b"{"):
            payload = b"\xff" + payload
        return topic, payload
    if kind == 1:  # broken JSON: a valid message cut short
        text = json.dumps(good).encode()
        return topic, text[:rng.randrange(1, len(text) - 1)]
    if kind == 2:  # wrong types
        key = rng.choice(["time", "lat", "lon"])
        return topic, json.dumps({**good, key: rng.choice(["x", True, None, [1], {}])}).encode()
    if kind == 3:  # huge numbers
        key = rng.choice(["lat", "lon", "time", "accuracy", "heading"])
        return topic, json.dumps(good).replace("}", f', "{key}": 1e999}}').encode() \
            if rng.random() < 0.5 else json.dumps({**good, key: -1e308}).encode()
    if kind == 4:  # bad ids in the payload (mismatch, too long, control characters)
        bad = rng.choice(["other", "y" * 80, "a\x01b", ""])
        return topic, json.dumps({**good, "vehicle": bad}).encode()
    if kind == 5:  # a clock far ahead of the receive time
        return topic, json.dumps({**good, "time": now + rng.uniform(3_600, 10**7)}).encode()
    if kind == 6:  # not an object
        return topic, rng.choice([b"[]", b"42", b"null", b'"text"', b"[1,2,3]"])
    if kind == 7:  # larger than mqtt.max_payload_bytes (1024 in the test config)
        return topic, json.dumps({**good, "pad": "z" * 1100}).encode()
    # kind 8: out of range or a time without a zone
    return topic, rng.choice([json.dumps({**good, "lat": 91.5}).encode(),
                              json.dumps({**good, "time": "2026-05-28T08:00:00"}).encode(),
                              json.dumps({**good, "speed": -3}).encode()])


def publish_all(port: int, messages: list[tuple[str, bytes]]) -> None:
    """Publish with QoS 1 from a plain paho client, waiting for every PUBACK."""
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"flood-{time.time_ns()}")
    client.max_inflight_messages_set(500)
    client.max_queued_messages_set(0)
    client.connect("127.0.0.1", port)
    client.loop_start()
    try:
        infos = [client.publish(topic, payload, qos=1) for topic, payload in messages]
        for info in infos:
            info.wait_for_publish(timeout=120)
    finally:
        client.disconnect()
        client.loop_stop()


async def metric_sum(port: int, name: str, **labels: str) -> float:
    """The sum of a worker's samples of one metric whose labels include ``labels``."""
    try:
        status, body = await http_get(port, "/metrics")
    except OSError:
        return -1.0
    assert status == 200
    total = 0.0
    for family in text_string_to_metric_families(body):
        for sample in family.samples:
            if sample.name == name and labels.items() <= sample.labels.items():
                total += float(sample.value)
    return total


def rss_kb(pid: int) -> int:
    """Resident set size of a process, KiB (Linux /proc)."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    return -1


def start_worker(config: Path, worker: str, port: int, log: Path) -> subprocess.Popen[bytes]:
    with log.open("ab") as out:
        return subprocess.Popen(
            [sys.executable, "-m", "livematch.cli", "run", "--config", str(config),
             "--group", "g", "--shards", str(SHARDS), "--worker", worker,
             "--metrics", f"127.0.0.1:{port}"],
            stdout=out, stderr=out, env=subprocess_env())


async def test_faults_three_workers_kill_restarts_and_flood(
        own_mosquitto: Mosquitto, tmp_path: Path, prefix: str) -> None:
    """Three workers; w2 SIGKILLed mid-feed, the broker restarted, Redis restarted, and
    malformed messages between the valid fixes: every valid QoS 1 fix is answered, no
    vehicle's state goes backwards, the survivors take the dead worker's shards."""
    redis_server = PersistentRedis(tmp_path / "redis-aof")
    redis_server.start()
    net = tmp_path / "town.lmnet"
    save_network(town(), net)
    cfg = write_config(tmp_path, prefix, broker=own_mosquitto.url, store=redis_server.url,
                       network=str(net), extra="[group]\nlease_s = 2.0\n")
    # A bound above the flood: every valid QoS 1 fix must be answered, so none may be
    # shed (shedding under overload has its own tests in test_service_backpressure.py).
    cfg.write_text(cfg.read_text().replace("reconnect_max_s = 0.5\n",
                                           "reconnect_max_s = 0.5\nintake_max = 200000\n"))
    ports = {w: free_port() for w in WORKERS}
    logs = {w: tmp_path / f"{w}.log" for w in WORKERS}
    feeds = {v: drive(v, N_FIXES, start_x=100.0 + 400 * i) for i, v in enumerate(VEHICLES)}
    rng = random.Random(20261201)
    now = time.time()
    flood = [malformed(rng, prefix, now) for _ in range(FLOOD)]
    client = aioredis.Redis.from_url(redis_server.url)
    backwards: list[str] = []
    seen: dict[str, float] = {}
    report: dict[str, object] = {"flood": FLOOD}

    rss_peak: dict[str, int] = {}

    async def watch_checkpoints() -> None:
        while True:
            for w in ("w1", "w3"):  # the survivors' largest resident size, every 0.1 s
                if procs[w].poll() is None:
                    rss_peak[w] = max(rss_peak.get(w, 0), rss_kb(procs[w].pid))
            try:
                for v, t in (await checkpoint_times(client, prefix)).items():
                    if t < seen.get(v, t):
                        backwards.append(f"{v}: {seen[v]} -> {t}")
                    seen[v] = max(t, seen.get(v, t))
            except (OSError, aioredis.RedisError):
                pass  # Redis is being restarted
            await asyncio.sleep(0.1)

    async def held(workers: tuple[str, ...]) -> list[float]:
        return [await metric(ports[w], "livematch_shards_held") for w in workers]

    procs = {w: start_worker(cfg, w, ports[w], logs[w]) for w in WORKERS}
    watcher = asyncio.create_task(watch_checkpoints())
    started = time.monotonic()
    try:
        async with Collector("127.0.0.1", own_mosquitto.port, f"{prefix}/out/#") as col:
            deadline = time.monotonic() + 90
            while await held(WORKERS) != [4, 4, 4]:
                assert time.monotonic() < deadline, f"no even split: {await held(WORKERS)}"
                for w, proc in procs.items():
                    assert proc.poll() is None, logs[w].read_text()
                await asyncio.sleep(0.2)
            rss_before = {w: rss_kb(procs[w].pid) for w in ("w1", "w3")}
            chunk = -(-FLOOD // PHASES)
            per_phase = N_FIXES // PHASES
            for phase in range(PHASES):
                bad = flood[phase * chunk:(phase + 1) * chunk]
                good = [(f"{prefix}/fleet/{v}/position", feeds[v][i][1])
                        for i in range(phase * per_phase, (phase + 1) * per_phase)
                        for v in VEHICLES]
                step = max(1, len(bad) // max(1, len(good)))
                mixed: list[tuple[str, bytes]] = []
                for k, message in enumerate(good):  # valid fixes between malformed ones
                    mixed.extend(bad[k * step:(k + 1) * step])
                    mixed.append(message)
                mixed.extend(bad[len(good) * step:])
                await asyncio.to_thread(publish_all, own_mosquitto.port, mixed)
                if phase == 0:  # kill w2 while its fixes are still being matched
                    killed_at = time.monotonic()
                    procs["w2"].send_signal(signal.SIGKILL)
                    await asyncio.to_thread(procs["w2"].wait, 10)
                    deadline = time.monotonic() + 60
                    while sum(await held(("w1", "w3"))) != SHARDS:
                        assert time.monotonic() < deadline, "dead worker's shards not taken"
                        await asyncio.sleep(0.05)
                    report["takeover_s"] = time.monotonic() - killed_at
                    rss_mid = {w: rss_kb(procs[w].pid) for w in ("w1", "w3")}
                elif phase == 1:  # restart the broker (persistent sessions survive)
                    own_mosquitto.stop()
                    await asyncio.sleep(0.5)
                    own_mosquitto.start()
                elif phase == 2:  # restart Redis (append-only file: data survives)
                    redis_server.stop()
                    await asyncio.sleep(0.5)
                    redis_server.start()
            want = {v: {t for t, _ in feeds[v]} for v in VEHICLES}
            deadline = time.monotonic() + 120 + FLOOD / 500
            while True:
                got = {v: {r["time"] for r in col.records(f"/out/match/{v}")} for v in VEHICLES}
                if got == want:
                    break
                missing = sum(len(want[v] - got[v]) for v in VEHICLES)
                assert time.monotonic() < deadline, f"{missing} fixes never answered"
                await asyncio.sleep(0.2)
            deadline = time.monotonic() + 60 + FLOOD / 1000
            while sum([await metric_sum(ports[w], "livematch_publish_queue_depth")
                       for w in ("w1", "w3")]) != 0:  # the tail of the flood's rejects
                assert time.monotonic() < deadline, "outputs still queued"
                await asyncio.sleep(0.5)
            await asyncio.sleep(1.0)  # the last ones on their way to the collector
            rejects = len(col.records("/out/rejects"))
            report["suppressed"] = sum(
                [await metric_sum(ports[w], "livematch_rejects_suppressed_total")
                 for w in ("w1", "w3")])
            report["reconnects"] = [await metric_sum(ports[w], "livematch_broker_reconnects_total")
                                    for w in ("w1", "w3")]
            report["lost"] = [await metric_sum(ports[w], "livematch_shards_lost_total")
                              for w in ("w1", "w3")]
            rss_after = {w: rss_kb(procs[w].pid) for w in ("w1", "w3")}
            report["shed"] = sum([await metric(ports[w], "livematch_fixes_shed_total")
                                  for w in ("w1", "w3")])
            report["peak"] = max([await metric(ports[w], "livematch_intake_queue_peak")
                                  for w in ("w1", "w3")])
            report["rejects"] = rejects
            report["rss_kb"] = {w: (rss_before[w], rss_after[w]) for w in rss_before}
            report["rss_mid_kb"] = {w: (rss_mid[w], rss_after[w]) for w in rss_mid}
            report["rss_peak_kb"] = {w: (rss_before[w], rss_peak[w]) for w in rss_before}
            deadline = time.monotonic() + 30
            while seen != {v: max(want[v]) for v in VEHICLES}:
                assert time.monotonic() < deadline, f"checkpoints lag: {seen}"
                await asyncio.sleep(0.1)
            for w in ("w1", "w3"):
                procs[w].send_signal(signal.SIGTERM)
                assert await asyncio.to_thread(procs[w].wait, 30) == 0, logs[w].read_text()
    finally:
        await end_group_run(watcher, procs, client)
        redis_server.stop()
    window_regressions = []
    answered = 0
    for v in VEHICLES:
        windows = col.windows(f"/out/match/{v}")
        answered += len(windows)
        if windows != [{k} for k in range(1, N_FIXES + 1)]:
            window_regressions.append(v)
    published = N_FIXES * len(VEHICLES)
    went_back = {b.split(":")[0] for b in backwards}
    elapsed = time.monotonic() - started
    growth = {w: (a - b) / 1024 for w, (b, a) in report["rss_kb"].items()}  # type: ignore[union-attr]
    growth_mid = {w: (a - b) / 1024
                  for w, (b, a) in report["rss_mid_kb"].items()}  # type: ignore[union-attr]
    growth_peak = {w: (a - b) / 1024
                   for w, (b, a) in report["rss_peak_kb"].items()}  # type: ignore[union-attr]
    lines = [
        "# Fault-injection suite",
        "",
        f"Command: `scripts/faults{' --full' if FLOOD >= 100_000 else ''}` "
        f"(tests/test_faults_suite.py; flood {FLOOD:,} malformed messages).",
        "",
        "3 workers (`livematch run --group`), 12 shards, lease 2 s, `mqtt.intake_max`",
        "200,000 (above the flood, so that no valid fix is shed), mosquitto and",
        "redis-server on loopback; w2 SIGKILLed after phase 1, broker restarted after",
        "phase 2, Redis restarted after phase 3; malformed messages (seeded generator:",
        "random bytes, cut JSON, wrong types, huge numbers, bad ids, clocks ahead,",
        "non-objects, oversize, out of range) interleaved with the valid fixes.",
        "",
        "| measure | value |",
        "|---------|-------|",
        f"| valid QoS 1 fixes published | {published} |",
        f"| valid fixes answered (distinct vehicle, time) | {answered} |",
        f"| vehicles whose checkpoint went back in fix time | {len(went_back)} |",
        f"| vehicles whose certificate window restarted | {len(window_regressions)} |",
        f"| time to take over the dead worker's shards | {report['takeover_s']:.2f} s |",
        f"| malformed messages published / reject records received (a)"
        f" | {FLOOD} / {rejects} |",
        f"| rejects not published for a full reject queue (`publish.reject_queue_max`)"
        f" | {report['suppressed']:.0f} |",
        "| broker reconnections of the survivors (w1, w3; the broker restart is one) | "
        + ", ".join(f"{n:.0f}" for n in report["reconnects"]) + " |",  # type: ignore[attr-defined]
        "| shards lost without a hand-over by the survivors (w1, w3) | "
        + ", ".join(f"{n:.0f}" for n in report["lost"]) + " |",  # type: ignore[attr-defined]
        "| RSS growth of the survivors, ready to end (w1, w3) (b) | "
        + ", ".join(f"{growth[w]:+.1f} MiB" for w in sorted(growth)) + " |",
        "| RSS growth of the survivors, after the takeover to end (phases 2-4) | "
        + ", ".join(f"{growth_mid[w]:+.1f} MiB" for w in sorted(growth_mid)) + " |",
        "| largest RSS of the survivors during the flood, above ready (w1, w3) | "
        + ", ".join(f"{growth_peak[w]:+.1f} MiB" for w in sorted(growth_peak)) + " |",
        f"| messages shed by the survivors / largest intake queue | {report['shed']:.0f}"
        f" / {report['peak']:.0f} |",
        f"| wall time of the scenario | {elapsed:.0f} s |",
        "",
        "(a) a reject is published by the worker holding the message's shard when it",
        "arrives, and again when a takeover replays a kept message that could have been",
        "a fix; messages redelivered by the broker after its restart (their PUBACK lost",
        "with the connection) are rejected again. Junk (not JSON, wrong types, too large)",
        "is not kept: when it arrives while its shard has no holder (w2's shards before",
        "the takeover, all shards while Redis is down) nobody rejects it. (b)",
        "includes the first fixes' compilation and matcher warm-up, the takeover of w2's",
        "shards and the kept-fix buffers (`group.buffer_s`, `group.buffer_max`), which",
        "hold every possible fix of the feed (not the junk) for 120 s.",
        "",
    ]
    text = "\n".join(lines)
    print("\n" + text)
    if os.environ.get("LIVEMATCH_FAULTS_REPORT"):  # set by scripts/faults
        RESULTS.parent.mkdir(parents=True, exist_ok=True)
        RESULTS.write_text(text)
    assert answered == published
    assert report["shed"] == 0
    assert backwards == []
    assert window_regressions == []
