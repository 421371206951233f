"""Benchmark: end-to-end load through a real broker, stepped up to each system's ceiling.

Run: ``.venv/bin/python bench/load.py [--rates 250,500,1000,2000,4000,8000,16000]
[--seconds 10] [--systems direct,relay,livematch-1,livematch-2,livematch-2s]
[--generators 2] [--refine 2] [--repeat 1] [--half-repeats 3] [--broker-nodelay]``

For every system, the offered load is stepped up (each vehicle sends one fix per second,
so N vehicles offer N fixes/s) until a step is not sustained, then the gap between the
last sustained and the first failed step is bisected ``--refine`` times. Every step runs,
on this machine and loopback only:

- a fresh ``mosquitto`` on a free loopback port (and a fresh ``redis-server`` for the
  two-worker group);
- the **system under test**: ``direct`` (none: the subscriber reads the input topic; the
  ceiling of the harness itself: generator + broker + subscriber), ``relay`` (a bare relay
  on the same MQTT client library as livematch, aiomqtt: subscribe, decode the JSON,
  publish it on an output topic; no matching; the ceiling livematch is compared with),
  ``livematch-1`` (``livematch run``, memory store) or ``livematch-2`` (two
  ``livematch run --group`` workers sharing the fleet through Redis shard leases; each
  worker receives the whole feed and drops the other's vehicles) or ``livematch-2s``
  (the same group with the shard in the input topic, ``fleet/{shard}/+/position``, the
  generators publishing each vehicle on its shard's topic: each worker subscribes only
  to the shards it holds or stands by for, the standby ones at livematch's default
  ``group.standby_qos`` = 0, on the worker's one connection:
  ``group.standby_connection = false``, written out since that default became true)
  or ``livematch-2s1`` (the same with ``standby_qos = 1``:
  every shard topic at QoS 1, as before that option existed) or ``livematch-2s0`` (the
  same with ``group.standby = false``: each worker subscribes only to the shards it
  holds, about half the feed) or ``livematch-2sm`` (a mixed pair: w0 as in
  ``livematch-2s``, w1 as in ``livematch-2s0``; next to ``livematch-2s0`` in the same
  round, w0's CPU over w1's in the two steps gives what standing by costs a worker,
  with the machine's drift between steps cancelled within each step) or
  ``livematch-2sc`` / ``livematch-2smc`` (``livematch-2s`` / ``livematch-2sm`` with
  ``group.standby_connection = true``: the standby shards on a second MQTT connection of
  their own, read when the worker is awake anyway) or ``livematch-2scu`` (``livematch-2sc``
  with ``group.balance_load = 0``: shards assigned by count only, as before session 23;
  the other systems leave ``balance_load`` at livematch's default) or ``livematch-2sk`` /
  ``livematch-2sk1`` (the same two, but the generators send only vehicles of the shards
  that worker w1 holds, the first ``rate`` vehicle ids whose shard it holds: w0 only
  keeps every fix, so its CPU per fix is what a kept fix costs, through the broker,
  and w1's what a matched one costs in a group); for breaking the group's cost down,
  ``livematch-1r`` (one worker, Redis store, no group) and ``livematch-1g`` (a group of
  one worker: it holds all shards, through Redis); ``livematch-1h`` (one worker, memory
  store, no group, fed only the vehicles among the step's that w1 of a two-worker group
  matches: 240 of 500, against which w1's costs in a group tell the group's own from
  those of half a feed); ``livematch-1n`` (``livematch-1`` never under the probe: with
  ``--cpu-per-fix`` livematch-1 runs under it, whose timers and 10 ms heartbeat cost
  CPU the group's workers do not pay, unless ``--probe-groups``); with ``--cpu-per-fix``
  a system written ``SYSTEM*K`` runs at K times the rate (``livematch-2sc*2``: each
  worker of the group matches as many fixes a second as one worker does at the rate, and
  the two-worker ratio is then taken at equal work per worker, not equal offered load;
  K may be a decimal: ``livematch-2sc*1.6`` gives each worker 0.8 of the single
  worker's rate, the share each would match if two reached 1.6 times one's
  throughput, so a ratio read there of 1.6 or more is self-consistent);
  and ``livematch-1p`` (two lone workers side by side, memory store, no group, w1 fed
  the vehicles w1 of a group would match on a topic of its own, ``fleetb/+/position``,
  w0 the others: a pair of processes as in a group, without the group);
- ``--generators`` **load generator** processes (paho-mqtt directly, QoS 1, up to 1,000
  publishes in flight each, every fix due in a 5 ms tick published as one batch), vehicle
  i in generator ``i % generators``, the N vehicles spread evenly over each second;
  positions from a pool of simulated drives on the invented demo town (vehicle i drives
  pool drive ``i % pool`` from second ``i // pool``); each fix stamped with the wall-clock
  time it is handed to the client. Every generator reports what it achieved: fixes
  published and acknowledged per second and how far it fell behind its schedule;
- a **subscriber** in this process (paho-mqtt, QoS 1) that only stores (receive time,
  payload); the payloads are decoded after the step.

Before a step's clock starts the system is warmed up. The bench compiles livematch's
kernels once in its own process (``prepare_kernels``, written to numba's on-disk cache
beside the sources), so no worker compiles them: after a checkout or a change to a kernel
the cache is cold, and a cold start took 36 s CPU per worker (74 s wall at load average 5);
two workers compiling at once took longer than the warm-up allowed, were stopped before
their cache was written, and every later run compiled again ("0/16 probes"). Then every
livematch worker's ``/readyz`` must answer 200 (connected, store reachable, first lease
round done; up to ``START_TIMEOUT_S``; a worker that exits ends the step with its exit
code), then 16 probe vehicles send fixes until each has had 3 answers (so the worker
group holds its shards and every worker has run its first sweep step). Probe outputs are
not counted; the start-up and warm-up seconds are reported per step. With
``--warm-feed S`` the step's own vehicles are then fed for S seconds before its clock
starts (the generators run S + ``--seconds`` seconds, the vehicles driving on), in every
system alike: a worker group counts its shards' vehicles once their first checkpoints
are written and moves a shard or two to even the load (``group.balance_load``), and
that move, its hand-over and replay, fall into those S seconds. Nothing of them is
counted in the step's CPU, latency or deliveries (only fixes stamped after the clock
started); the messages each worker received during the warm feed, the load snapshots
written and the shards taken over while the clock ran are reported per step.

After the step the processes stop in dependency order: generators, then the system under
test (SIGTERM; a livematch worker writes its final checkpoints, releases its leases and
disconnects; up to ``STOP_TIMEOUT_S``, then SIGKILL), then Redis and the broker. The
livematch workers' exit codes are reported per step (0: a clean shutdown).

**Sustained** (all must hold):

1. the generators published >= 99 % of the offered fixes within the step plus 1 s
   (otherwise the step measures the generator, and it is marked ``generator-bound``);
2. >= 99 % of the fixes' outputs reached the subscriber by the end of the step plus 5 s;
3. latency is not growing: the median latency of the fixes sent in the last third of
   the step exceeds that of the first third by at most 100 ms (a system short of the
   offered rate by a few per cent builds a queue, and its latency grows by that fraction
   of every second, about 70 ms over a 10 s step per 1 % short);
4. p99 latency <= 1,000 ms.

Reported per step: offered fixes/s, generator fixes/s and schedule lag, outputs received
per second while the step ran, the share delivered, latency p50 / p99 (from fix time to
output received; first and last third too), CPU seconds used by the system under test,
the broker, the generators and the subscriber, the 1-minute load average before the step
(/proc/loadavg, as ``uptime`` prints it). Then per system the maximum sustained rate, the
ratios livematch-1 / relay and livematch-2 / livematch-1, and ``--half-repeats`` runs of
livematch-1 at half of its maximum with their p50 / p99. Everything shares the machine's
cores (and, here, other people's work): on 2 cores the two-worker group cannot be faster.
Results: ``bench/results/load.md`` and ``load.json``.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import functools
import itertools
import json
import os
import shutil
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
NETWORK = ROOT / "replay_logs" / "larkmoor.geojson"
IN_TOPIC = "fleet/+/position"
SHARD_TOPIC = "fleet/{shard}/+/position"  # livematch-2s: the feed partitioned by shard
SPLIT_TOPIC = "fleetb/+/position"  # livematch-1p: the second lone worker's half of the feed
GROUP_SHARDS = 64  # livematch's default group.shards
RELAY_IN_FLIGHT = 256  # the relay's QoS 1 publishes awaiting their PUBACK at once
GEN_IN_FLIGHT = 1000  # each generator's QoS 1 publishes awaiting their PUBACK at once
GEN_TICK_S = 0.005  # a generator publishes every fix due in one batch per tick
POOL_DRIVES = 200  # simulated drives shared by all vehicles
POOL_SECONDS = 60  # vehicle i starts pool drive i % POOL_DRIVES at second i // POOL_DRIVES
PROBES = 16  # warm-up vehicles
START_TIMEOUT_S = 600.0  # a worker's start until /readyz answers 200 (a cold compile ~75 s)
STOP_TIMEOUT_S = 60.0  # a stopped process's exit (a worker's final checkpoints), then SIGKILL
WARM_FIXES = 3  # outputs each warm-up vehicle must have had
CPROFILE_TO: Path | None = None  # --cprofile: run every livematch worker under cProfile
SPY_TO: Path | None = None  # --py-spy-to: sample every livematch worker with py-spy
SPY_RATE = 200  # --py-spy-rate: samples a second
GRACE_S = 5.0  # outputs arriving later than the step's end + this are missing
MAX_P99_MS = 1000.0
MAX_GROWTH_MS = 100.0
CLK_TCK = os.sysconf("SC_CLK_TCK")
WARM_FEED_S = 0  # --warm-feed: seconds the step's vehicles are fed before its clock starts
GAP_S = 0.001  # a handle call this long after the previous one ended counts as "after a gap"
BROKER_NODELAY = False  # --broker-nodelay: mosquitto's set_tcp_nodelay (off by default)


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
    """A fresh broker; with ``--broker-nodelay`` it sets TCP_NODELAY on its sockets."""
    port = free_port()
    conf = folder / "mosquitto.conf"
    nodelay = "set_tcp_nodelay true\n" if BROKER_NODELAY else ""
    conf.write_text(f"listener {port} 127.0.0.1\nallow_anonymous true\n"
                    "max_queued_messages 1000000\nmax_inflight_messages 1000\n"
                    f"{nodelay}user {os.environ.get('USER') or 'root'}\n", encoding="utf-8")
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


def cpu_seconds(pid: int) -> float:
    """User + system CPU time of a live process (0 when it is gone)."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return 0.0
    return (int(fields[11]) + int(fields[12])) / CLK_TCK


def cpu_split(pid: int) -> tuple[float, float]:
    """(user, system) CPU seconds of a live process ((0, 0) when it is gone)."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return 0.0, 0.0
    return int(fields[11]) / CLK_TCK, int(fields[12]) / CLK_TCK


def run_ns(pid: int) -> int:
    """CPU time of a live process's threads in nanoseconds (0 when it is gone).

    The sum of the first field of ``/proc/PID/task/*/schedstat`` (the scheduler's run
    time of each thread). ``/proc/PID/stat`` gives user and system time in clock ticks
    (10 ms here): a worker's 0.8-0.9 s of a step is then read to about 1 %, as large as
    the difference the within-step comparison looks for. A thread that ended during the
    step is left out (the daemon's threads live as long as it does).
    """
    total = 0
    try:
        for task in Path(f"/proc/{pid}/task").iterdir():
            with contextlib.suppress(OSError):
                total += int((task / "schedstat").read_text().split()[0])
    except OSError:
        return 0
    return total


def sleeps(pid: int) -> int:
    """Voluntary context switches of a live process and its threads (0 when it is gone).

    Each is a time the process blocked (waiting in ``epoll`` for the socket, mostly)
    and had to be woken again: on this VM such a wake-up costs far more CPU than a turn
    of the event loop that finds work waiting (``--loop-cost``).
    """
    total = 0
    try:
        for task in Path(f"/proc/{pid}/task").iterdir():
            for line in (task / "status").read_text().splitlines():
                if line.startswith("voluntary_ctxt_switches:"):
                    total += int(line.split()[1])
    except OSError:
        return 0
    return total


def loop_cost(seconds: float = 3.0) -> dict[str, float]:
    """CPU (user + system) per turn of an asyncio loop that blocks 1 ms, and of one that
    never blocks, in this process: the price of waking up against the loop's own cost."""
    async def turns(stop: float, period: float) -> int:
        n = 0
        while time.perf_counter() < stop:
            await asyncio.sleep(period)
            n += 1
        return n

    out: dict[str, float] = {"loadavg_1m": load_average()}
    for name, period in (("blocking_us", 0.001), ("busy_us", 0.0)):
        t0 = os.times()
        n = asyncio.run(turns(time.perf_counter() + seconds, period))
        t1 = os.times()
        out[name] = round((t1.user - t0.user + t1.system - t0.system) / n * 1e6, 1)
    return out


def kept_cost(rounds: int = 20, vehicles: int = 500) -> dict[str, Any]:
    """Thread CPU per message a worker of a group only keeps (another worker's shard).

    In this process, no broker and no socket: a group daemon (64 shards, holding none,
    its lease manager's Redis client never connected) takes ``rounds`` x ``vehicles``
    QoS 0 position messages the way its MQTT receiver hands them over, from the point
    where a PUBLISH has been decoded into a message: with ``Daemon._arrive`` where the
    livematch on ``PYTHONPATH`` has it, else the intake queue's ``put_nowait``, its
    ``get_nowait`` and ``Daemon._process`` as the receive loop did. What it leaves out
    (reading the packet, the PUBACK's send, turns of the event loop) is the same for
    both. Best of three passes, in µs per message. Then the same messages as QoS 0
    MQTT 5 PUBLISH packets, from the bytes the socket gives (``_read_packets``, 64 KiB
    reads) to the kept entry: *read_kept_us_per_message*, by ``Daemon._take_raw``
    where the livematch on ``PYTHONPATH`` has it, else paho's decoding and
    ``Daemon._arrive``; *standby_read_kept_us_per_message* the same as read from the
    standby connection (``group.standby_connection``), where the livematch has it. In
    both, the first message of each vehicle's topic takes paho's way where that
    livematch sends it there (one in ``rounds``). And the payload type check alone
    (``looks_like_position``, which a matched fix's payload gets besides the pipeline's
    own decoding).
    """
    import aiomqtt
    import redis.asyncio as aioredis

    from livematch.config import load_config
    from livematch.feed.decode import looks_like_position
    from livematch.mapdata.netfile import open_network
    from livematch.pipeline import Pipeline
    from livematch.service.daemon import Daemon
    from livematch.service.mqtt import IntakeQueue, ReceivedTopic
    from livematch.service.shards import LeaseManager

    folder = Path(tempfile.mkdtemp(prefix="lm-kept-"))
    cfg = daemon_config(folder, free_port(), "redis://127.0.0.1:1/0", "w0", "kept")
    config = load_config(cfg, env={})
    pipeline = Pipeline(open_network(config.inputs.network), config.matcher, limits=config.feed,
                        alerts=config.alerts, control_topic=config.mqtt.control_topic)
    feed = [(f"fleet/v{i}/position",
             f'{{"vehicle":"v{i}","time":{1.8e9 + k:.3f},"lat":51.5,"lon":-1.2,'
             f'"accuracy":5.0}}'.encode()) for k in range(rounds) for i in range(vehicles)]

    async def run() -> float:
        daemon = Daemon(config, pipeline)
        client = aiomqtt.Client("127.0.0.1", 1)  # never connected: QoS 0 needs no PUBACK
        redis = aioredis.Redis.from_url("redis://127.0.0.1:1/0")
        daemon.leases = LeaseManager(redis, url="redis://127.0.0.1:1/0", prefix="load:",
                                     group="kept", worker="w0", n_shards=64, lease_s=5.0)
        intake = IntakeQueue(len(feed) + 1, key_of=daemon._intake_key)
        arrive = getattr(daemon, "_arrive", None)
        messages = [aiomqtt.Message(ReceivedTopic(t), b, 0, False, k, None)
                    for k, (t, b) in enumerate(feed)]
        t0 = time.thread_time()
        for message in messages:
            if arrive is not None:
                arrive(client, intake, message)
                while not intake.empty():  # none expected: nothing of its shards is queued
                    intake.get_nowait()
            else:
                intake.put_nowait(message)
                intake.get_nowait()
                daemon._process(client, message, intake.last_key)
        spent = time.thread_time() - t0
        assert not pipeline.vehicles(), "a kept-only message was matched"
        await redis.aclose()
        return spent / len(messages) * 1e6

    def type_check() -> float:  # the payload check every received message gets
        t0 = time.thread_time()
        for _, payload in feed:
            looks_like_position(payload, config.feed)
        return (time.thread_time() - t0) / len(feed) * 1e6

    def publish_packet(topic: str, payload: bytes) -> bytes:
        """A QoS 0 MQTT 5 PUBLISH without properties (MQTT 5.0 section 3.3)."""
        name = topic.encode()
        rest = len(name).to_bytes(2, "big") + name + b"\x00" + payload
        size, length = len(rest), bytearray()
        while True:  # remaining length, a variable byte integer (section 1.5.5)
            byte, size = size % 128, size // 128
            length.append(byte | (0x80 if size else 0))
            if not size:
                break
        return bytes((0x30,)) + bytes(length) + rest

    stream = b"".join(publish_packet(t, b) for t, b in feed)

    class Socket:
        """The broker's side of the connection, as recv sees it: the stream, then nothing."""

        def __init__(self) -> None:
            self.at = 0

        def recv(self, n: int) -> bytes:
            if self.at >= len(stream):
                raise BlockingIOError
            self.at += n
            return stream[self.at - n:self.at]

        def fileno(self) -> int:
            return -1

        def close(self) -> None:
            return None

    async def run_read(standby: bool = False) -> float:
        """As run(), from the bytes read from the socket (``_read_packets`` onwards);
        with ``standby``, as read from the standby connection
        (``group.standby_connection``: its queue, ``Daemon._arrive_standby``)."""
        import inspect

        from livematch.service import mqtt

        daemon = Daemon(config, pipeline)
        client = aiomqtt.Client("127.0.0.1", 1)
        redis = aioredis.Redis.from_url("redis://127.0.0.1:1/0")
        daemon.leases = LeaseManager(redis, url="redis://127.0.0.1:1/0", prefix="load:",
                                     group="kept", worker="w0", n_shards=64, lease_s=5.0)
        intake = IntakeQueue(len(feed) + 1, key_of=daemon._intake_key)
        if standby:
            intake.arrive = daemon._arrive_standby
            daemon._standby_intake = intake
        else:
            intake.arrive = functools.partial(daemon._arrive, client, intake)
        mqtt.lean_receive(client, deliver=intake.put_nowait)
        paho = client._client
        sock = paho._sock = mqtt._BufferedSocket(Socket(), lambda: None)
        take = getattr(daemon, "_take_raw", None)
        extra = ([functools.partial(take, client, intake)]
                 if take is not None and len(inspect.signature(mqtt._read_packets).parameters) > 3
                 else [])
        t0 = time.thread_time()
        while sock._sock.at < len(stream) or sock.leftover():
            mqtt._read_packets(paho, sock, paho.loop_read, *extra)
            while not intake.empty():  # none expected: nothing of its shards is queued
                intake.get_nowait()
        spent = time.thread_time() - t0
        assert not pipeline.vehicles(), "a kept-only message was matched"
        assert daemon._kept_seq == len(feed), daemon._kept_seq
        await redis.aclose()
        return spent / len(feed) * 1e6

    best = min(asyncio.run(run()) for _ in range(3))
    read = min(asyncio.run(run_read()) for _ in range(3))
    standby = (round(min(asyncio.run(run_read(standby=True)) for _ in range(3)), 2)
               if hasattr(Daemon, "_arrive_standby") else None)
    return {"loadavg_1m": load_average(), "messages": len(feed), "rounds": rounds,
            "path": "_arrive" if hasattr(Daemon, "_arrive") else "queue + _process",
            "kept_us_per_message": round(best, 2),
            "read_path": "_take_raw" if hasattr(Daemon, "_take_raw") else "paho + _arrive",
            "read_kept_us_per_message": round(read, 2),
            "standby_read_kept_us_per_message": standby,
            "type_check_us": round(min(type_check() for _ in range(3)), 2)}


def shell_cost(calls: int = 200_000, rounds: int = 2_000) -> dict[str, Any]:
    """Fixed costs of the daemon's shell, in µs, without broker (``--shell-cost``).

    *drain*: thread CPU of one ``mqtt.drain`` call that finds nothing to read.

    The receive loop drains the broker's socket after every matched message (to shed a
    backlog in the intake queue, not at the broker); at 500 fixes/s the socket is
    usually empty then, so the call is its own overhead and one ``select``. Measured
    on a connected pair of local sockets wrapped as ``buffered_reads`` wraps paho's
    socket (``mqtt._BufferedSocket``), with an unconnected paho client of the
    livematch on ``PYTHONPATH`` whose socket is that wrapper: best of five passes of
    ``calls`` calls. The same with the plain socket unwrapped beside it.

    *trim step*: process CPU (all threads) of the checkpoint round's trim step when no
    trim is due (every round but one a minute, twice a second): an
    ``asyncio.to_thread`` of ``Trimmer.maybe`` (a round trip through the thread pool,
    as the daemon did) against ``Trimmer.due`` in the event loop; ``rounds`` awaits in
    one event loop, best of five.

    *encode*: ``encode_record`` per published record (:func:`encode_cost`).
    """
    import aiomqtt

    from livematch.service import mqtt

    near, far = socket.socketpair()
    near.setblocking(False)

    async def make() -> Any:  # aiomqtt wants a running loop
        return aiomqtt.Client("127.0.0.1", 1)
    client = asyncio.run(make())
    paho = client._client

    def best(sock: Any) -> float:
        paho._sock = sock
        times = []
        for _ in range(5):
            t0 = time.thread_time()
            for _ in range(calls):
                mqtt.drain(client, 100, 0.005)
            times.append(time.thread_time() - t0)
        return min(times) / calls * 1e6

    wrapped = best(mqtt._BufferedSocket(near, lambda: None))
    plain = best(near)
    paho._sock = None
    near.close()
    far.close()

    from livematch.service.allocator import Trimmer

    async def trim_steps(thread: bool) -> float:
        trimmer = Trimmer(3600.0, trim=lambda pad: 1)
        trimmer.maybe(time.monotonic())  # trimmed just now: none due for an hour
        t0 = time.process_time()
        for _ in range(rounds):
            if thread:
                await asyncio.to_thread(trimmer.maybe, time.monotonic())
            else:
                trimmer.due(time.monotonic())
        return (time.process_time() - t0) / rounds * 1e6

    via_thread = min(asyncio.run(trim_steps(True)) for _ in range(5))
    in_loop = (round(min(asyncio.run(trim_steps(False)) for _ in range(5)), 3)
               if hasattr(Trimmer, "due") else None)  # before session 25: no check
    return {"loadavg_1m": load_average(), "calls": calls,
            "drain_idle_us_buffered": round(wrapped, 3), "drain_idle_us_plain": round(plain, 3),
            "trim_step_us_thread": round(via_thread, 2), "trim_step_us_check": in_loop,
            "encode_us": encode_cost()}


def encode_cost(vehicles: int = 20, seconds: int = 60, calls: int = 100_000) -> dict[str, Any]:
    """Thread CPU of ``encode_record`` per published record, by kind, in µs.

    The records are the pipeline's own (:func:`pipeline_records`). Then, for each kind, ``calls``
    encodings cycling through its records, best of five passes: *all*
    (``encode_record``), *check* (the float check that decides msgspec or
    ``json.dumps``: ``livematch.core.events.plain_json`` where that livematch has it,
    else ``daemon._plain_floats``) and *msgspec* (the daemon's encoder alone).
    """
    from livematch.service import daemon

    _, by_kind = pipeline_records(vehicles, seconds)
    try:
        from livematch.core.events import plain_json as check  # session 26 on
    except ImportError:
        check = daemon._plain_floats  # type: ignore[attr-defined]
    encoder = daemon._ENCODER

    def best(fn: Any, records: list[Any]) -> float:
        batch = list(itertools.islice(itertools.cycle(records), calls))
        times = []
        for _ in range(5):
            t0 = time.thread_time()
            for record in batch:
                fn(record)
            times.append(time.thread_time() - t0)
        return round(min(times) / calls * 1e6, 3)

    out: dict[str, Any] = {}
    for kind, records in by_kind.items():
        out[kind] = {"records": len(records),
                     "all": best(daemon.encode_record, records),
                     "check": best(check, records),
                     "msgspec": best(encoder.encode, records)}
    return out


def pool_drive(net: Any, allowed: Any, i: int, seconds: int) -> tuple[Any, Any]:
    """Drive ``i`` of the generators' pool (seed 77): its fixes' lon and lat arrays.

    ``seconds`` s of one fix a second on ``net`` over the ``allowed`` segments, GPS
    error included (``livematch.sim.drive`` defaults), as :func:`make_pool` and
    :func:`pipeline_records` both make them.
    """
    import numpy as np

    from livematch.sim.drive import DriveSettings, simulate_drive

    d = simulate_drive(net, np.random.default_rng([77, i]), f"v{i}", 0.0,
                       DriveSettings(duration_s=float(seconds)), allowed)
    xs = [p.x + e[0] for p, e in zip(d.truth, d.error_xy, strict=False)]
    ys = [p.y + e[1] for p, e in zip(d.truth, d.error_xy, strict=False)]
    return net.projection.to_lonlat(xs, ys)


def pipeline_records(vehicles: int, seconds: int) -> tuple[Any, dict[str, list[Any]]]:
    """The pipeline and its assignment and commit records for simulated drives.

    ``vehicles`` drives of ``seconds`` s on the demo town (as the generators' pool, seed
    77), one fix a second each, sent as the generators send them through a ``Pipeline``
    of the livematch on ``PYTHONPATH`` (which then holds the vehicles).
    """

    from livematch.config import load_config
    from livematch.mapdata.netfile import open_network
    from livematch.pipeline import Pipeline
    from livematch.sim.drive import drivable_segments

    folder = Path(tempfile.mkdtemp(prefix="lm-records-"))
    config = load_config(daemon_config(folder, free_port(), "memory://", "w0", ""), env={})
    shutil.rmtree(folder, ignore_errors=True)
    net = open_network(str(NETWORK))
    pipeline = Pipeline(net, config.matcher, limits=config.feed, alerts=config.alerts)
    allowed = drivable_segments(net)
    messages: list[tuple[float, str, bytes]] = []
    for i in range(vehicles):
        lon, lat = pool_drive(net, allowed, i, seconds)
        for k in range(len(lon)):
            t = 1.8e9 + k + i / vehicles
            messages.append((t, f"fleet/v{i}/position",
                             f'{{"vehicle":"v{i}","time":{t:.3f},"lat":{lat[k]:.7f},'
                             f'"lon":{lon[k]:.7f},"accuracy":5.0}}'.encode()))
    messages.sort()
    by_kind: dict[str, list[Any]] = {"assignment": [], "commit": []}
    for t, topic, payload in messages:
        for out in pipeline.handle(topic, payload, t):
            if out.kind in by_kind:
                by_kind[out.kind].append(out.record)
    return pipeline, by_kind


def checkpoint_cost(rounds: int = 200, shards: int = 32, latest: int = 4,
                    blobs: int = 6) -> dict[str, Any]:
    """Thread CPU of one checkpoint round's Redis write in a group worker, in µs.

    A worker of a two-worker group at 500 fixes/s matches about 250 a second and holds
    32 shards; its checkpoint round (twice a second) writes each shard's dirty latest
    records (about four), the blobs of the vehicles due (one every
    ``checkpoint_every_fixes`` = 20 fixes: about six a round) and no deletions, in one
    pipeline of ``EVALSHA`` commands (``LeaseManager.save_many``). Here, in this process
    with a fresh ``redis-server``: a ``LeaseManager`` of the livematch on ``PYTHONPATH``
    that acquires ``shards`` shards, then ``rounds`` rounds of ``save_many`` with
    ``latest`` latest records per shard and ``blobs`` blobs on the first shards, the
    pipeline's own records and checkpoints (:func:`pipeline_records`). *round*: thread
    CPU per ``save_many``, median of the rounds and best of three passes of them (the
    event loop's thread does the packing, the sending and the reply's parsing; Redis is
    another process). *pack*: the packing of the same commands alone, best of three:
    ``livematch.service.shards.resp_command`` where that livematch has it (session 26
    on), else redis-py's (``Connection.pack_commands``, what its pipeline calls).
    *packer* says which. *hiredis*: whether redis-py found the ``hiredis`` package (its
    C packer and reply parser).
    """
    import redis.asyncio as aioredis
    from redis.utils import HIREDIS_AVAILABLE

    from livematch.service import shards as shards_module
    from livematch.service.daemon import encode_record
    from livematch.service.shards import LeaseManager, ShardWrite

    pipeline, by_kind = pipeline_records(20, 60)
    records = [encode_record(r) for r in by_kind["assignment"]]
    checkpoints = [pipeline.export_vehicle(v) for v in sorted(pipeline.vehicles())]
    folder = Path(tempfile.mkdtemp(prefix="lm-ckpt-"))
    proc, port = start_redis(folder)
    url = f"redis://127.0.0.1:{port}/0"

    async def run() -> tuple[float, float, float]:
        client = aioredis.Redis.from_url(url)
        leases = LeaseManager(client, url=url, prefix="ckpt:", group="g", worker="w0",
                              n_shards=64, lease_s=60.0)
        for shard in range(shards):
            assert await leases.acquire(shard) is not None
        writes = []
        k = 0
        for shard in range(shards):
            mine = {}
            for _ in range(latest):
                mine[f"v{k}"] = records[k % len(records)]
                k += 1
            kept = ({f"v{k}": checkpoints[shard % len(checkpoints)]} if shard < blobs else {})
            writes.append(ShardWrite(shard, leases.held[shard], kept, mine, []))
        await leases.save_many(writes, ttl_s=3600.0)  # the script loaded, the connection made
        passes = []
        for _ in range(3):
            spent = []
            for _ in range(rounds):
                t0 = time.thread_time()
                oks = await leases.save_many(writes, ttl_s=3600.0)
                spent.append(time.thread_time() - t0)
                assert all(oks)
            passes.append(statistics.median(spent))
        commands = []
        for write in writes:
            keys, args = leases._save_call(write, 3600.0)
            commands.append(("EVALSHA", leases._save.sha, len(keys), *keys, *args))
        connection = aioredis.Connection()
        packer = getattr(shards_module, "resp_command", None)  # session 26 on: its own packer

        def pack() -> None:
            if packer is None:
                connection.pack_commands(commands)
                return
            out: list[bytes] = []
            for command in commands:
                packer(out, command, connection.encoder)
            b"".join(out)
        packs = []
        for _ in range(3):
            t0 = time.thread_time()
            for _ in range(rounds):
                pack()
            packs.append((time.thread_time() - t0) / rounds)
        size = sum(len(b) for b in connection.pack_commands(commands))
        await client.aclose()
        return min(passes) * 1e6, min(packs) * 1e6, size

    try:
        round_us, pack_us, size = asyncio.run(run())
    finally:
        proc.terminate()
        proc.wait()
        shutil.rmtree(folder, ignore_errors=True)
    return {"loadavg_1m": load_average(), "hiredis": HIREDIS_AVAILABLE, "rounds": rounds,
            "shards": shards, "latest_per_shard": latest, "blobs": blobs,
            "request_bytes": size, "round_us": round(round_us, 1), "pack_us": round(pack_us, 1),
            "packer": "resp_command" if hasattr(shards_module, "resp_command") else "redis-py"}


def wait_ready(ports: list[int], procs: list[subprocess.Popen[bytes]],
               timeout: float = START_TIMEOUT_S) -> float:
    """Wait until every livematch worker's ``/readyz`` answers 200; seconds it took.

    ``ports[k]`` is the metrics port of ``procs[k]``. Raises when a worker exits first
    (with its exit code) or when one is not ready within ``timeout``.
    """
    import urllib.error
    import urllib.request

    started = time.monotonic()
    waiting = dict(zip(ports, procs, strict=True))
    while waiting:
        for port, proc in list(waiting.items()):
            if proc.poll() is not None:
                raise RuntimeError(f"livematch worker (metrics port {port}) exited with "
                                   f"code {proc.returncode} before it was ready")
            with contextlib.suppress(OSError, urllib.error.URLError), \
                    urllib.request.urlopen(f"http://127.0.0.1:{port}/readyz", timeout=5) as r:
                if r.status == 200:  # 503 (not ready) raises HTTPError, a URLError
                    del waiting[port]
        if waiting and time.monotonic() - started > timeout:
            raise RuntimeError(f"{len(waiting)} livematch worker(s) not ready after "
                               f"{timeout:.0f} s (metrics ports {sorted(waiting)})")
        if waiting:
            time.sleep(0.2)
    return time.monotonic() - started


def stop_all(procs: list[subprocess.Popen[bytes]], timeout: float = STOP_TIMEOUT_S) -> None:
    """SIGTERM every process, wait for each (``timeout`` in all), SIGKILL what is left."""
    for p in procs:
        if p.poll() is None:
            p.terminate()
    end = time.monotonic() + timeout
    for p in procs:
        try:
            p.wait(timeout=max(0.1, end - time.monotonic()))
        except subprocess.TimeoutExpired:
            p.kill()
            p.wait(timeout=15)


def scrape_published(port: int) -> dict[str, float]:
    """``livematch_published_total`` by kind, read from a daemon's /metrics.

    Also, under the keys ``@held`` and ``@received``, ``livematch_shards_held`` and
    ``livematch_messages_received_total`` (the shares of a worker group), under
    ``@matched`` ``livematch_fixes_processed_total`` (the fixes it matched), under
    ``@takeovers`` and ``@snapshots`` ``livematch_shard_takeovers_total`` and
    ``livematch_load_snapshots_total`` (shards moving, ``group.balance_load``), and under
    ``@gc`` the seconds its garbage collections took (``livematch_gc_pause_seconds``).
    """
    import urllib.request

    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
        text = r.read().decode()
    out: dict[str, float] = {}
    for line in text.splitlines():
        if line.startswith("livematch_published_total{"):
            kind = line.split('kind="', 1)[1].split('"', 1)[0]
            out[kind] = float(line.rsplit(" ", 1)[1])
        elif line.startswith("livematch_shards_held "):
            out["@held"] = float(line.rsplit(" ", 1)[1])
        elif line.startswith("livematch_messages_received_total "):
            out["@received"] = float(line.rsplit(" ", 1)[1])
        elif line.startswith("livematch_fixes_processed_total "):
            out["@matched"] = float(line.rsplit(" ", 1)[1])
        elif line.startswith("livematch_shard_takeovers_total "):
            out["@takeovers"] = float(line.rsplit(" ", 1)[1])
        elif line.startswith("livematch_load_snapshots_total "):
            out["@snapshots"] = float(line.rsplit(" ", 1)[1])
        elif line.startswith("livematch_gc_pause_seconds_sum{"):
            out["@gc"] = out.get("@gc", 0.0) + float(line.rsplit(" ", 1)[1])
    return out


def load_average() -> float:
    """The 1-minute load average, as ``uptime`` prints it."""
    return float(Path("/proc/loadavg").read_text().split()[0])


def cpu_pressure() -> float | None:
    """Share of the last 10 s in which some runnable task waited for a CPU (Linux PSI, %)."""
    try:
        return float(Path("/proc/pressure/cpu").read_text().split()[1].split("=")[1])
    except (OSError, IndexError, ValueError):
        return None


def paho_client(name: str) -> Any:
    import paho.mqtt.client as mqtt

    return mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"{name}-{os.getpid()}",
                       protocol=mqtt.MQTTv311)


def connect(client: Any, port: int) -> None:
    """Connect and run the network loop in a thread; return once connected."""
    connected = threading.Event()
    client.on_connect = lambda *_a: connected.set()
    client.connect("127.0.0.1", port, keepalive=60)
    client.loop_start()
    if not connected.wait(10.0):
        raise RuntimeError(f"could not connect to the broker on 127.0.0.1:{port}")


# --------------------------------------------------------------- the drive pool
def make_pool(path: Path) -> None:
    """``POOL_DRIVES`` drives of ``POOL_SECONDS`` + 70 s on the demo town, lon/lat at 1 Hz."""
    import numpy as np

    from livematch.mapdata.netfile import open_network
    from livematch.sim.drive import drivable_segments

    net = open_network(str(NETWORK))
    allowed = drivable_segments(net)
    seconds = POOL_SECONDS + 70
    lon = np.empty((POOL_DRIVES, seconds))
    lat = np.empty((POOL_DRIVES, seconds))
    for i in range(POOL_DRIVES):
        lo, la = pool_drive(net, allowed, i, seconds)
        k = min(seconds, len(lo))
        lon[i, :k], lat[i, :k] = lo[:k], la[:k]
        lon[i, k:], lat[i, k:] = lo[k - 1], la[k - 1]
    np.savez(path, lon=lon, lat=lat)


def position(pool: Any, i: int, k: int) -> tuple[float, float]:
    """Vehicle ``i``'s (lon, lat) at second ``k`` of the step."""
    row, start = i % POOL_DRIVES, (i // POOL_DRIVES) % POOL_SECONDS
    return float(pool["lon"][row, start + k]), float(pool["lat"][row, start + k])


# ------------------------------------------------------------------ the generator role
def feed_topic(vehicle: str, shards: int, split: frozenset[int] = frozenset()) -> str:
    """The input topic of a vehicle: ``fleet/<vehicle>/position``, or with ``shards`` > 0
    ``fleet/<shard>/<vehicle>/position`` (livematch's ``{shard}`` topic level). With
    ``split`` (and no ``shards``), a vehicle whose shard of ``GROUP_SHARDS`` is in it
    sends on ``fleetb/<vehicle>/position`` (``SPLIT_TOPIC``, ``livematch-1p``)."""
    if shards <= 0:
        if split:
            from livematch.service.shards import shard_of

            if shard_of(vehicle, GROUP_SHARDS) in split:
                return SPLIT_TOPIC.replace("+", vehicle)
        return f"fleet/{vehicle}/position"
    from livematch.service.shards import shard_of

    return f"fleet/{shard_of(vehicle, shards)}/{vehicle}/position"


def generate(port: int, pool_path: str, n: int, seconds: int, first: int, step: int,
             shards: int, only_shards: str = "", among: bool = False,
             split: bool = False) -> None:
    """Publish vehicles first, first + step, ... < n at 1 Hz; print what was achieved.

    With ``only_shards`` (comma-separated shard numbers) the n vehicles are the first n
    ids ``v<i>`` whose shard is one of those, instead of v0 ... v(n-1); with ``among``
    too, only those of v0 ... v(n-1) whose shard (of ``GROUP_SHARDS``) is one of them
    (``livematch-1h``: the vehicles w1 of a two-worker group matches, fed to one worker).
    With ``split`` instead, v0 ... v(n-1) all, those of the ``only_shards`` on
    ``SPLIT_TOPIC`` (``livematch-1p``).

    Protocol with the bench: prints ``ready`` once connected, reads ``go <epoch>`` (the
    start of second 0), publishes, waits for the acknowledgements and prints one JSON line.
    """
    import numpy as np

    pool = dict(np.load(pool_path))
    ids = list(range(n))
    cut: frozenset[int] = frozenset()
    if only_shards and split:
        cut = frozenset(int(s) for s in only_shards.split(","))
    elif only_shards:
        from livematch.service.shards import shard_of

        wanted = {int(s) for s in only_shards.split(",")}
        if among:
            ids = [i for i in ids if shard_of(f"v{i}", GROUP_SHARDS) in wanted]
        else:
            ids = [i for i in range(100 * n + 1000)
                   if shard_of(f"v{i}", shards) in wanted][:n]
    mine = ids[first::step]
    topics = {i: feed_topic(f"v{i}", shards, cut) for i in mine}
    slot = {i: j for j, i in enumerate(ids)}  # spread over each second by place, not id
    plan = [(k + slot[i] / len(ids), i, *position(pool, i, k)) for k in range(seconds)
            for i in mine]
    acked = [0]

    def on_publish(*_a: Any) -> None:
        acked[0] += 1

    client = paho_client("gen")
    client.max_inflight_messages_set(GEN_IN_FLIGHT)
    client.max_queued_messages_set(0)
    client.on_publish = on_publish
    connect(client, port)
    print("ready", flush=True)
    t0 = float(sys.stdin.readline().split()[1])
    lags: list[float] = []
    published = 0
    first_at = last_at = 0.0
    j = 0
    while j < len(plan):
        now = time.time()
        due = plan[j][0] + t0
        if due > now:  # sleep a whole tick at least: what falls due meanwhile is one batch
            time.sleep(max(GEN_TICK_S, due - now))
            continue
        if not first_at:
            first_at = now
        while j < len(plan) and plan[j][0] + t0 <= now:  # one batch: everything due
            offset, i, lon, lat = plan[j]
            stamp = time.time()
            client.publish(topics[i],
                           f'{{"vehicle":"v{i}","time":{stamp:.3f},"lat":{lat:.7f},'
                           f'"lon":{lon:.7f},"accuracy":5.0}}', qos=1)
            lags.append(stamp - t0 - offset)
            published += 1
            j += 1
        last_at = time.time()
    end = time.time() + 30.0
    while acked[0] < published and time.time() < end:
        time.sleep(0.01)
    acked_at = time.time()
    client.loop_stop()
    client.disconnect()
    lags.sort()
    print(json.dumps({
        "published": published, "acked": acked[0], "first_at": first_at,
        "last_at": last_at, "acked_at": acked_at,
        "lag_p50_ms": round(lags[len(lags) // 2] * 1000, 1) if lags else None,
        "lag_p99_ms": round(lags[int(0.99 * (len(lags) - 1))] * 1000, 1) if lags else None,
        "lag_max_ms": round(lags[-1] * 1000, 1) if lags else None,
    }), flush=True)


def py_spy_binary() -> str:
    """py-spy beside this Python (``pip install py-spy`` in the venv), else on PATH."""
    beside = Path(sys.executable).parent / "py-spy"
    return str(beside) if beside.exists() else (shutil.which("py-spy") or str(beside))


def shards_held(worker: str, workers: list[str], n_shards: int) -> set[int]:
    """The shards ``worker`` holds with a ``{shard}`` topic, as the livematch imported
    assigns them (bounded-load ``assign_shards``; before it, the first of
    ``rank_workers``)."""
    from livematch.service import shards

    assign = getattr(shards, "assign_shards", None)
    if assign is not None:
        held: set[int] = assign(n_shards, workers).held_by(worker)
        return held
    return {s for s in range(n_shards) if shards.rank_workers(s, workers)[0] == worker}


def worker_layout(system: str) -> tuple[int, bool, str]:
    """A livematch system's workers: how many, whether on Redis, their group ("": none).

    ``livematch-2*`` is a group of two on Redis; ``livematch-1r`` one worker on Redis
    without a group, ``livematch-1g`` a group of one; ``livematch-1p`` two lone workers
    on the memory store, each fed its own part of the feed. Those two must not form a
    group: with the plain topic a group gives each shard to whichever worker wins its
    lease (not to the worker fed its vehicles), and a fix reaching a worker that does
    not hold its shard is kept for a takeover, never matched (docs/scale.md, "Which
    worker answers"); session 27's ``livematch-1p`` did, and its warm-up never ended.

    Example:
        >>> worker_layout("livematch-1p"), worker_layout("livematch-2sc")
        ((2, False, ''), (2, True, 'load'))
        >>> worker_layout("livematch-1"), worker_layout("livematch-1r")
        ((1, False, ''), (1, True, ''))
    """
    if system.startswith("livematch-2"):
        return 2, True, "load"
    if system == "livematch-1p":
        return 2, False, ""
    if system in ("livematch-1r", "livematch-1g"):
        return 1, True, "" if system == "livematch-1r" else "load"
    return 1, False, ""


# ------------------------------------------------------------------- the relay role
async def relay(port: int, topic: str) -> None:
    """Subscribe, decode, publish on ``relay/out/<vehicle>``: no matching (the ceiling)."""
    import logging

    import aiomqtt
    import msgspec

    # aiomqtt warns whenever more than 10 publishes await their PUBACK: that is the plan.
    logging.getLogger("mqtt").setLevel(logging.ERROR)
    # paho-mqtt keeps at most 20 QoS 1 publishes in flight unless told otherwise; the
    # relay's window is RELAY_IN_FLIGHT, so the client must allow as many.
    async with aiomqtt.Client("127.0.0.1", port, identifier=f"relay-{os.getpid()}",
                              max_inflight_messages=RELAY_IN_FLIGHT) as client:
        await client.subscribe(topic, qos=1)
        inflight = asyncio.Semaphore(RELAY_IN_FLIGHT)
        pending: set[asyncio.Task[None]] = set()
        async for message in client.messages:
            record = msgspec.json.decode(message.payload)  # the ceiling still decodes
            await inflight.acquire()
            task = asyncio.create_task(client.publish(
                f"relay/out/{record['vehicle']}", msgspec.json.encode(record), qos=1))
            task.add_done_callback(lambda _t: inflight.release())
            pending.add(task)
            task.add_done_callback(pending.discard)


# ---------------------------------------------------------------- the probe role
def probe(argv: list[str], out_path: str, nodelay: bool, freeze: bool, inflight: int) -> int:
    """Run ``livematch <argv>`` with timing probes; write them to ``out_path`` at exit.

    Nothing in livematch is changed: the probes wrap public methods from outside.
    Recorded (epoch s, milliseconds): every garbage collection (generation, pause,
    objects collected), every ``Pipeline.handle``, ``Pipeline.export_vehicle`` (one per
    vehicle checkpointed) and ``Pipeline.tick`` call, and every stall of the event loop
    longer than 20 ms (a 10 ms heartbeat that woke late). ``nodelay`` sets TCP_NODELAY on
    the MQTT socket (off in paho-mqtt: a small write waits for the previous one's ACK).
    ``freeze`` calls ``gc.freeze()`` once the event loop runs (the map and every module
    loaded), so full collections no longer walk those objects. ``inflight`` > 0 lets the
    MQTT client keep that many QoS 1 publishes in flight (paho-mqtt's default is 20).
    """
    import atexit
    import gc
    import socket as socket_module

    from livematch.cli import main as livematch_main
    from livematch.pipeline import Pipeline

    rec: dict[str, list[Any]] = {"gc": [], "handle": [], "export": [], "tick": [],
                                 "stall": []}
    gc_started = [0.0]

    def on_gc(phase: str, info: dict[str, int]) -> None:
        if phase == "start":
            gc_started[0] = time.perf_counter()
        else:
            rec["gc"].append((time.time(), info["generation"],
                              (time.perf_counter() - gc_started[0]) * 1000,
                              info["collected"]))

    gc.callbacks.append(on_gc)

    def timed(name: str, fn: Any) -> Any:
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            started, cpu = time.perf_counter(), time.thread_time()
            try:
                return fn(*args, **kwargs)
            finally:
                # (end epoch s, wall ms, CPU ms of this thread: not counting the time
                # another process held the core)
                rec[name].append((time.time(), (time.perf_counter() - started) * 1000,
                                  (time.thread_time() - cpu) * 1000))
        return wrapper

    Pipeline.handle = timed("handle", Pipeline.handle)  # type: ignore[method-assign]
    Pipeline.export_vehicle = timed(  # type: ignore[method-assign]
        "export", Pipeline.export_vehicle)
    Pipeline.tick = timed("tick", Pipeline.tick)  # type: ignore[method-assign]
    if inflight > 0:
        import aiomqtt

        plain_init = aiomqtt.Client.__init__

        def init(self: Any, *args: Any, **kwargs: Any) -> None:
            kwargs["max_inflight_messages"] = inflight
            plain_init(self, *args, **kwargs)

        aiomqtt.Client.__init__ = init  # type: ignore[method-assign]
    if nodelay:
        plain = socket_module.create_connection

        def create_connection(*args: Any, **kwargs: Any) -> socket_module.socket:
            sock = plain(*args, **kwargs)
            sock.setsockopt(socket_module.IPPROTO_TCP, socket_module.TCP_NODELAY, 1)
            return sock

        socket_module.create_connection = create_connection  # type: ignore[assignment]
    plain_run = asyncio.run

    async def heartbeat() -> None:
        if freeze:
            gc.collect()
            gc.freeze()
        while True:
            before = time.perf_counter()
            await asyncio.sleep(0.01)
            late = (time.perf_counter() - before - 0.01) * 1000
            if late > 20:
                rec["stall"].append((time.time(), late))

    def run(main: Any, **kwargs: Any) -> Any:
        async def both() -> Any:
            beat = asyncio.create_task(heartbeat())
            try:
                return await main
            finally:
                beat.cancel()
        return plain_run(both(), **kwargs)

    asyncio.run = run  # type: ignore[assignment]

    def dump() -> None:
        from livematch.native import describe

        rec["objects_at_exit"] = [len(gc.get_objects()), gc.get_freeze_count()]
        rec["native"] = describe()  # which build ran: compiled or from source
        Path(out_path).write_text(json.dumps(rec), encoding="utf-8")

    atexit.register(dump)
    return livematch_main(argv)


# --------------------------------------------------------------------------- one step
def daemon_config(folder: Path, port: int, store: str, worker: str, group: str,
                  topic: str = IN_TOPIC, metrics_port: int = 0,
                  standby_qos: int | None = None, standby: bool = True,
                  standby_connection: bool = False,
                  balance_load: float | None = None) -> Path:
    """A daemon configuration; ``metrics_port`` > 0 opens its /metrics on that port.

    ``standby_qos`` sets ``group.standby_qos`` (None: livematch's default);
    ``standby`` False writes ``group.standby = false``; with standbys
    ``group.standby_connection`` is written as given (livematch's default is true from
    session 22 on; the systems without ``c`` in their name keep one connection).
    ``balance_load`` sets ``group.balance_load`` (None: livematch's default).
    """
    cfg = folder / f"{worker}.toml"
    listen = f"127.0.0.1:{metrics_port}" if metrics_port else ""
    group_lines = f'[group]\nname = "{group}"\nworker = "{worker}"\nlease_s = 5\n' if group else ""
    if group and standby_qos is not None:
        group_lines += f"standby_qos = {standby_qos}\n"
    if group and not standby:
        group_lines += "standby = false\n"
    if group and standby:
        group_lines += f"standby_connection = {'true' if standby_connection else 'false'}\n"
    if group and balance_load is not None:
        group_lines += f"balance_load = {balance_load}\n"
    cfg.write_text(f"""
[inputs]
network = "{NETWORK}"

[mqtt]
url = "mqtt://127.0.0.1:{port}"
topic = "{topic}"
client_id = "load-{worker}"
control_topic = ""

[store]
url = "{store}"
key_prefix = "load:"

[metrics]
listen = "{listen}"

[log]
level = "warning"
{group_lines}""", encoding="utf-8")
    return cfg


class Subscriber:
    """Stores (receive time, payload) of every output; decodes nothing while running."""

    def __init__(self, port: int, topic: str) -> None:
        self.got: list[tuple[float, bytes]] = []
        self.client = paho_client("sub")
        self.client.on_message = lambda _c, _u, m: self.got.append((time.time(), m.payload))
        self.subscribed = threading.Event()
        self.client.on_subscribe = lambda *_a: self.subscribed.set()
        connect(self.client, port)
        self.client.subscribe(topic, qos=1)
        if not self.subscribed.wait(10.0):
            raise RuntimeError(f"subscription to {topic!r} not acknowledged")

    def close(self) -> None:
        self.client.loop_stop()
        self.client.disconnect()


def warm_up(sub: Subscriber, pool: Any, shards: int, timeout: float = 60.0,
            split: frozenset[int] = frozenset()) -> float:
    """Send probe fixes until every probe vehicle has had 3 outputs; seconds it took.

    Three, not one: a vehicle's first fix is answered without a sweep step, and the first
    sweep step of a process loads the compiled kernel (most of a second).
    """
    started = time.time()
    answered: dict[str, int] = {}
    k = 0
    while len(answered) < PROBES or min(answered.values()) < WARM_FIXES:
        if time.time() - started > timeout:
            missing = [f"probe{p}" for p in range(PROBES)
                       if answered.get(f"probe{p}", 0) < WARM_FIXES]
            raise RuntimeError(f"system not answering: {len(answered)}/{PROBES} probes "
                               f"(short of {WARM_FIXES} answers: {', '.join(missing)})")
        for p in range(PROBES):
            lon, lat = position(pool, POOL_DRIVES - 1 - p, k % 60)
            sub.client.publish(feed_topic(f"probe{p}", shards, split), json.dumps(
                {"vehicle": f"probe{p}", "time": round(time.time(), 3), "lat": lat,
                 "lon": lon, "accuracy": 5.0}), qos=1)
        k += 1
        time.sleep(0.5)
        answered.clear()
        for _at, payload in list(sub.got):
            vehicle = json.loads(payload).get("vehicle", "")
            if vehicle.startswith("probe"):
                answered[vehicle] = answered.get(vehicle, 0) + 1
    time.sleep(1.0)  # let the last probes' outputs arrive
    return time.time() - started


def percentile(values: list[float], q: float) -> float | None:
    return round(values[int(q * (len(values) - 1))] * 1000, 1) if values else None


def _measured(got: list[tuple[float, bytes]], t0: float) -> int:
    """How many outputs in ``got`` answer fixes stamped at or after ``t0``."""
    return sum(1 for _at, payload in list(got)
               if float(json.loads(payload).get("time", 0.0)) >= t0)


def run_step(system: str, rate: int, seconds: int, generators: int, pool_path: Path,
             probe_to: Path | None = None, nodelay: bool = False, freeze: bool = False,
             inflight: int = 0, py_spy: bool = False, count_publishes: bool = False
             ) -> dict[str, Any]:
    """One step: ``rate`` vehicles at 1 Hz for ``seconds`` through ``system``.

    With ``count_publishes`` (livematch only) the daemon's /metrics is opened and its
    publishes by kind during the step are reported (``published_by_kind``).

    With ``probe_to`` every livematch worker runs under :func:`probe` (worker k's records
    in ``probe.w<k>.json``; with ``py_spy`` the first is sampled by py-spy while the step
    runs); the probe records, py-spy's collapsed stacks and every fix's (fix time,
    latency) land in that folder.
    """
    import numpy as np

    pool = dict(np.load(pool_path))
    folder = Path(tempfile.mkdtemp(prefix="lm-load-"))
    procs: list[subprocess.Popen[bytes]] = []
    sut: list[subprocess.Popen[bytes]] = []
    gens: list[subprocess.Popen[bytes]] = []
    sub: Subscriber | None = None
    shards = GROUP_SHARDS if system.startswith("livematch-2s") else 0
    standby_qos = 1 if system in ("livematch-2s1", "livematch-2sk1") else None
    only = (",".join(str(s) for s in sorted(shards_held("w1", ["w0", "w1"], shards)))
            if system.startswith("livematch-2sk") else "")
    among = system == "livematch-1h"  # one worker fed only the vehicles w1 would match
    # livematch-1p: two lone workers side by side (memory store, no group), w1 fed the
    # vehicles w1 of a group would match (on SPLIT_TOPIC), w0 the others
    fed_w1 = (frozenset(shards_held("w1", ["w0", "w1"], GROUP_SHARDS))
              if system == "livematch-1p" else frozenset())
    if fed_w1:
        only = ",".join(str(s) for s in sorted(fed_w1))
    vehicles = rate
    if among:
        held = shards_held("w1", ["w0", "w1"], GROUP_SHARDS)
        only = ",".join(str(s) for s in sorted(held))
        from livematch.service.shards import shard_of

        vehicles = sum(1 for i in range(rate) if shard_of(f"v{i}", GROUP_SHARDS) in held)
    metrics_ports: list[int] = []  # every livematch worker's /metrics and /readyz
    ready_s = 0.0
    exit_codes: list[int | None] = []
    if system.startswith("livematch"):
        # Compile (or load) the kernels here, once per bench process: with a cold cache
        # the workers would each compile them while the step waits.
        from livematch.pipeline import prepare_kernels

        wall, cpu = time.monotonic(), time.process_time()
        prepare_kernels()  # cached per process: later calls return at once
        if time.monotonic() - wall > 1.0:
            print(f"livematch kernels compiled in {time.monotonic() - wall:.1f} s "
                  f"({time.process_time() - cpu:.1f} s CPU)", file=sys.stderr, flush=True)
    published0: list[dict[str, float]] = []
    published1: list[dict[str, float]] = []
    loadavg, pressure = load_average(), cpu_pressure()
    try:
        broker, port = start_mosquitto(folder)
        procs.append(broker)
        env = dict(os.environ)
        if system == "direct":
            out_topic = IN_TOPIC
        elif system == "relay":
            out_topic = "relay/out/#"
            sut.append(subprocess.Popen([sys.executable, __file__, "--role", "relay",
                                         "--port", str(port)], env=env))
        else:
            out_topic = "livematch/match/#"
            workers, on_redis, group = worker_layout(system)
            store = "memory://"
            if on_redis:
                redis, rport = start_redis(folder)
                procs.append(redis)
                store = f"redis://127.0.0.1:{rport}/0"
            for w in range(workers):
                metrics_ports.append(free_port())
                cfg = daemon_config(folder, port, store, f"w{w}", group,
                                    SHARD_TOPIC if shards else
                                    SPLIT_TOPIC if fed_w1 and w == 1 else IN_TOPIC,
                                    metrics_ports[-1],
                                    standby_qos, system != "livematch-2s0"
                                    and not (system in ("livematch-2sm", "livematch-2smc")
                                             and w == 1),
                                    system in ("livematch-2sc", "livematch-2smc",
                                               "livematch-2scu"),
                                    0.0 if system == "livematch-2scu" else None)
                cmd = [sys.executable, "-m", "livematch.cli"]
                if CPROFILE_TO is not None:  # --cprofile: each worker's profile at its exit
                    cmd = [sys.executable, "-m", "cProfile", "-o",
                           str(CPROFILE_TO.resolve()
                               / f"{system}.{rate}.w{w}.{time.time():.0f}.prof"),
                           "-m", "livematch.cli"]
                if probe_to is not None:
                    cmd = [sys.executable, str(Path(__file__).resolve()), "--role", "probe",
                           "--probe-out", str(probe_to / f"probe.w{w}.json")] \
                        + (["--nodelay"] if nodelay else []) \
                        + (["--freeze"] if freeze else []) \
                        + (["--inflight", str(inflight)] if inflight else [])
                # started in the step's folder: ``python -m`` puts the working directory
                # first on sys.path, so a run from a checkout would import that
                # checkout's livematch whatever PYTHONPATH says (an A/B against another
                # tree would then compare a tree with itself)
                sut.append(subprocess.Popen([*cmd, "run", "--config", str(cfg)], env=env,
                                            cwd=folder))
        procs.extend(sut)
        sub = Subscriber(port, out_topic)
        if metrics_ports:
            ready_s = wait_ready(metrics_ports, sut)
        warm_s = warm_up(sub, pool, shards, split=fed_w1) if sut else 0.0
        for g in range(generators):
            gens.append(subprocess.Popen(
                [sys.executable, __file__, "--role", "generator", "--port", str(port),
                 "--pool", str(pool_path), "--n", str(rate),
                 "--seconds", str(WARM_FEED_S + seconds),
                 "--first", str(g), "--step", str(generators), "--shards", str(shards),
                 "--only-shards", only] + (["--among"] if among else [])
                + (["--split"] if fed_w1 else []),
                env=env, stdin=subprocess.PIPE, stdout=subprocess.PIPE))
        procs.extend(gens)
        for gen in gens:
            assert gen.stdout is not None
            if gen.stdout.readline().strip() != b"ready":
                raise RuntimeError("a generator did not start")
        sub.got.clear()
        spies: list[subprocess.Popen[bytes]] = []
        stamp = f"{time.time():.0f}"
        spy_outs = ([(sut[0].pid, probe_to / "py-spy.txt")] if py_spy and probe_to is not None
                    else [(p.pid, SPY_TO / f"{system}.{rate}.w{k}.{stamp}.txt")
                          for k, p in enumerate(sut)]
                    if SPY_TO is not None and system.startswith("livematch") else [])
        for pid, spy_out in spy_outs:
            # --py-spy-to: only the thread holding the GIL is sampled, without stopping
            # the process (a thread waiting on a lock or queue, or the loop in epoll,
            # is not counted as busy, and the workers are not paused 200 times a second)
            spies.append(subprocess.Popen(
                [py_spy_binary(), "record", "--pid", str(pid), "--rate",
                 str(SPY_RATE if SPY_TO is not None else 200), "--format", "raw",
                 "--duration", str(seconds + 1), "--output", str(spy_out)]
                + (["--gil", "--nonblocking"] if SPY_TO is not None else []),
                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        scraped = metrics_ports if count_publishes else []
        warm0: list[dict[str, float]] = []
        if WARM_FEED_S:  # --warm-feed: the vehicles run first, the clock starts later
            warm0 = [scrape_published(mp) for mp in scraped]
            t_feed = time.time() + 0.3
            for gen in gens:
                assert gen.stdin is not None
                gen.stdin.write(f"go {t_feed}\n".encode())
                gen.stdin.flush()
            time.sleep(max(0.0, t_feed + WARM_FEED_S - time.time()))
            sub.got.clear()
        published0 = [scrape_published(mp) for mp in scraped]
        window0 = time.time()
        cpu0 = {p.pid: cpu_seconds(p.pid) for p in procs}
        split0 = {p.pid: cpu_split(p.pid) for p in sut}
        sleeps0 = {p.pid: sleeps(p.pid) for p in sut}
        run0 = {p.pid: run_ns(p.pid) for p in sut}
        self0 = time.process_time()
        if WARM_FEED_S:
            t0 = t_feed + WARM_FEED_S
        else:
            t0 = time.time() + 0.3
            for gen in gens:
                assert gen.stdin is not None
                gen.stdin.write(f"go {t0}\n".encode())
                gen.stdin.flush()
        expected = vehicles * seconds
        deadline = t0 + seconds + GRACE_S
        while time.time() < deadline and len(sub.got) < expected:
            time.sleep(0.05)
        while WARM_FEED_S and time.time() < deadline and _measured(sub.got, t0) < expected:
            time.sleep(0.05)  # outputs of warm-feed fixes arrived after the clock started
        cpu = {p.pid: cpu_seconds(p.pid) - cpu0[p.pid] for p in procs}
        woken = {p.pid: sleeps(p.pid) - sleeps0[p.pid] for p in sut}
        ran = {p.pid: run_ns(p.pid) - run0[p.pid] for p in sut}
        split = {p.pid: tuple(b - a for a, b in zip(split0[p.pid], cpu_split(p.pid),
                                                     strict=True)) for p in sut}
        self_cpu = time.process_time() - self0
        window1 = time.time()
        published1 = [scrape_published(mp) for mp in scraped]
        reports = []
        for gen in gens:
            out, _ = gen.communicate(timeout=60)
            reports.append(json.loads(out.decode().strip().splitlines()[-1]))
        got = list(sub.got)
        for spy in spies:
            spy.wait(timeout=60)
    finally:
        if sub is not None:
            with contextlib.suppress(Exception):
                sub.close()
        # Dependency order: the workers write their final checkpoints into Redis and
        # disconnect from the broker, so both must outlive them.
        stop_all(gens)
        stop_all(sut)
        stop_all([p for p in reversed(procs) if p not in gens and p not in sut])
        if metrics_ports:  # livematch workers: 0 is a clean shutdown
            exit_codes = [p.returncode for p in sut]
        shutil.rmtree(folder, ignore_errors=True)

    third = seconds / 3.0
    lat_all: list[float] = []
    lat_first: list[float] = []
    lat_last: list[float] = []
    in_run = 0
    seen: set[tuple[str, float]] = set()
    for at, payload in got:
        record = json.loads(payload)
        vehicle = str(record.get("vehicle", ""))
        if not vehicle.startswith("v"):
            continue
        fix_t = float(record["time"])
        if fix_t < t0:
            continue  # a fix of the warm feed (--warm-feed)
        if (vehicle, fix_t) in seen:
            continue  # a redelivered output counts once
        seen.add((vehicle, fix_t))
        latency = at - fix_t
        lat_all.append(latency)
        if fix_t < t0 + third:
            lat_first.append(latency)
        elif fix_t >= t0 + 2 * third:
            lat_last.append(latency)
        if at <= t0 + seconds:
            in_run += 1
    if probe_to is not None:
        (probe_to / "fixes.json").write_text(json.dumps(
            {"t0": t0, "fixes": [(json.loads(p)["time"], at) for at, p in got
                                 if str(json.loads(p).get("vehicle", "")).startswith("v")]}),
            encoding="utf-8")
    for values in (lat_all, lat_first, lat_last):
        values.sort()
    published = sum(r["published"] for r in reports)
    gen_span = max(r["last_at"] for r in reports) - t0
    gen_ok = (published >= 0.99 * vehicles * (WARM_FEED_S + seconds)
              and gen_span <= seconds + 1.0)
    share = len(lat_all) / expected if expected else 0.0
    p50_first, p50_last = percentile(lat_first, 0.5), percentile(lat_last, 0.5)
    growth = (p50_last - p50_first) if p50_first is not None and p50_last is not None else None
    p99 = percentile(lat_all, 0.99)
    sustained = (gen_ok and share >= 0.99 and growth is not None
                 and growth <= MAX_GROWTH_MS and p99 is not None and p99 <= MAX_P99_MS)
    broker_pid, sut_pids = procs[0].pid, {p.pid for p in sut}
    gen_pids = {p.pid for p in gens}
    return {
        "system": system, "offered_per_s": vehicles, "seconds": seconds,
        "generators": generators, "loadavg_1m": loadavg, "cpu_pressure_10s": pressure,
        "cpu_pressure_10s_after": cpu_pressure(), "start_s": round(ready_s, 1),
        "warm_up_s": round(warm_s, 1), "warm_feed_s": WARM_FEED_S,
        "worker_exit_codes": exit_codes,
        "generator_published": published,
        "generator_per_s": round(published / max(gen_span, 1e-9) if published else 0.0, 1),
        "generator_acked": sum(r["acked"] for r in reports),
        "generator_lag_p99_ms": max(r["lag_p99_ms"] or 0.0 for r in reports),
        "generator_lag_max_ms": max(r["lag_max_ms"] or 0.0 for r in reports),
        "generator_ok": gen_ok,
        "received_in_run_per_s": round(in_run / seconds, 1),
        "delivered": len(lat_all), "delivered_share": round(share, 4),
        "p50_ms": percentile(lat_all, 0.5), "p99_ms": p99,
        "p50_first_third_ms": p50_first, "p50_last_third_ms": p50_last,
        "p99_first_third_ms": percentile(lat_first, 0.99),
        "p99_last_third_ms": percentile(lat_last, 0.99),
        "growth_ms": round(growth, 1) if growth is not None else None,
        "cpu_s": {"system": round(sum(cpu[p] for p in sut_pids), 2),
                  "broker": round(cpu[broker_pid], 2),
                  "generators": round(sum(cpu[p] for p in gen_pids), 2),
                  "subscriber": round(self_cpu, 2)},
        "system_user_sys_s": [round(sum(split[p][0] for p in sut_pids), 2),
                              round(sum(split[p][1] for p in sut_pids), 2)],
        "worker_cpu_s": [round(cpu[p.pid], 3) for p in sut],  # each process of the system
        "worker_user_sys_s": [[round(v, 2) for v in split[p.pid]] for p in sut],
        "worker_sleeps": [woken[p.pid] for p in sut],  # wake-ups of each process
        "worker_run_s": [round(ran[p.pid] / 1e9, 6) for p in sut],  # schedstat, ns
        "system_sleeps": sum(woken.values()),  # voluntary context switches (wake-ups)
        "published_by_kind": {k: sum(b.get(k, 0.0) - a.get(k, 0.0)
                                     for a, b in zip(published0, published1, strict=True))
                              for k in sorted({k for d in published1 for k in d})
                              if not k.startswith("@")}
        if published1 else None,
        # per worker: shards held at the end of the step, messages received during it
        "worker_shards_held": [d.get("@held") for d in published1] if published1 else None,
        "worker_received": [d.get("@received", 0.0) - a.get("@received", 0.0)
                            for a, d in zip(published0, published1, strict=True)]
        if published1 else None,
        # --warm-feed: messages each worker received during it, shards held when the
        # clock started; shards taken over while it ran (a move in the measured window);
        # load snapshots written from the start of the feed to the end of the step
        "worker_matched": [d.get("@matched", 0.0) - a.get("@matched", 0.0)
                           for a, d in zip(published0, published1, strict=True)]
        if published1 else None,
        "worker_received_warm": [b.get("@received", 0.0) - a.get("@received", 0.0)
                                 for a, b in zip(warm0, published0, strict=True)]
        if warm0 else None,
        "worker_shards_held_start": [d.get("@held") for d in published0]
        if published0 else None,
        "worker_takeovers": [d.get("@takeovers", 0.0) - a.get("@takeovers", 0.0)
                             for a, d in zip(published0, published1, strict=True)]
        if published1 else None,
        "load_snapshots": sum(d.get("@snapshots", 0.0) for d in published1)
        if published1 else None,
        "worker_gc_s": [round(d.get("@gc", 0.0) - a.get("@gc", 0.0), 4)
                        for a, d in zip(published0, published1, strict=True)]
        if published1 else None,
        "cpu_window": [window0, window1],
        "sustained": sustained,
        "verdict": ("sustained" if sustained else
                    "generator-bound" if not gen_ok else "not sustained"),
    }


# ------------------------------------------------------------------------ the search
def ceiling(system: str, rates: list[int], refine: int, seconds: int, generators: int,
            pool: Path, rows: list[dict[str, Any]]) -> dict[str, Any]:
    """Step ``rates`` up until a step fails, then bisect ``refine`` times."""
    best: int | None = None
    failed: int | None = None
    bound = False
    first_row = len(rows)

    def step(rate: int) -> bool:
        nonlocal bound
        row = run_step(system, rate, seconds, generators, pool)
        print(json.dumps(row), flush=True)
        rows.append(row)
        bound = bound or row["verdict"] == "generator-bound"
        return bool(row["sustained"])

    for rate in rates:
        if step(rate):
            best = rate
        else:
            failed = rate
            break
    for _ in range(refine):
        if best is None or failed is None or bound:
            break
        mid = int(round((best + failed) / 2 / 50.0) * 50)
        if mid in (best, failed):
            break
        if step(mid):
            best = mid
        else:
            failed = mid
    return {"system": system, "max_sustained_per_s": best, "first_failed_per_s": failed,
            "generator_bound": bound, "steps": len(rows) - first_row}


# ------------------------------------------------------------ the CPU-per-fix mode
def handle_stats(rec: dict[str, Any], a: float, b: float) -> dict[str, Any]:
    """One probed worker's ``Pipeline.handle`` calls that ended within [a, b].

    ``calls``; ``ms``: their summed thread CPU; ``mean`` / ``median`` µs per call; and the
    same split by the time since the worker's previous ``handle`` call ended (``soon``:
    within ``GAP_S``, the tracker's code and data likely still in the caches;
    ``after_gap``: later), each ``[calls, mean µs, median µs]``. A worker that matches
    fewer fixes a second, or reads others' fixes between its own, has more calls after
    a gap: comparing the two classes across systems tells a dearer call from a colder one.
    """
    rows = sorted((r[0] - r[1] / 1000, r[0], r[2]) for r in rec["handle"] if a <= r[0] <= b)
    calls = [r[2] * 1000 for r in rows]
    soon: list[float] = []
    late: list[float] = []
    for (_s0, end0, _c0), (start, _e, cpu) in itertools.pairwise(rows):
        (soon if start - end0 < GAP_S else late).append(cpu * 1000)

    def three(v: list[float]) -> list[Any]:
        return [len(v), round(statistics.fmean(v), 1) if v else None,
                round(statistics.median(v), 1) if v else None]

    return {"calls": len(calls), "ms": round(sum(calls) / 1000, 2),
            "mean": three(calls)[1], "median": three(calls)[2],
            "soon": three(soon), "after_gap": three(late)}


def cpu_per_fix(rate: int, seconds: int, repeat: int, generators: int, systems: list[str],
                out: Path, name: str, note: str = "", probe: bool = True,
                probe_all: bool = False) -> dict[str, Any]:
    """CPU time per fix of each process, the systems in turn at one fixed rate.

    Robust to a shared machine in a way the ceiling search is not: each system handles
    the same fixes (``rate`` x ``seconds``) at the same offered rate, and CPU seconds
    (user + system, /proc/<pid>/stat) count only work done, not time spent waiting for a
    core that someone else holds. The systems alternate, ``repeat`` rounds, so a change
    in the machine's load hits both alike; the ratio is taken within each round. With
    ``probe_all`` every livematch worker runs under the probe, not only livematch-1's,
    and each worker's ``Pipeline.handle`` calls are reported (:func:`handle_stats`).
    """
    started = time.strftime("%Y-%m-%d %H:%M", time.gmtime())
    rows: list[dict[str, Any]] = []
    with tempfile.TemporaryDirectory(prefix="lm-pool-") as tmp:
        pool = Path(tmp) / "pool.npz"
        make_pool(pool)
        for k in range(1, repeat + 1):
            for system in systems:
                probe_dir = Path(tempfile.mkdtemp(prefix="lm-cpu-"))
                probed = probe and (system == "livematch-1" or (
                    probe_all and system.startswith("livematch")))
                # SYSTEM*K: that system at K times the rate (a group of two at 2 x: each
                # worker matches as many fixes a second as one worker at the rate; at
                # 1.6 x each matches 0.8 of it, as at a throughput 1.6 times one's)
                base, _, times = system.partition("*")
                row = run_step(base, round(rate * float(times or 1)), seconds, generators,
                               pool,
                               probe_to=probe_dir if probed else None,
                               count_publishes=system.startswith("livematch"))
                row["system"] = system
                row["repeat"] = k
                # fixes whose output arrived while the CPU was counted (all of them when
                # the system kept up; then the same for every system)
                fixes = max(1, row["delivered"])
                row["pipeline_ms_per_fix"] = None
                if probed:
                    recs = [json.loads(f.read_text(encoding="utf-8"))
                            for f in sorted(probe_dir.glob("probe.w*.json"))]
                    row["worker_handle"] = [handle_stats(r, *row["cpu_window"])
                                            for r in recs]
                if probed and system == "livematch-1":
                    rec = recs[0]
                    a, b = row["cpu_window"]
                    row["pipeline_ms_per_fix"] = {
                        name: round(sum(r[2] for r in rec[name] if a <= r[0] <= b)
                                    / fixes, 4) for name in ("handle", "export", "tick")}
                    # the handle calls' CPU one by one: mean and median (µs), and the
                    # collections during the window (their pauses fall inside handle)
                    calls = sorted(r[2] for r in rec["handle"] if a <= r[0] <= b)
                    row["handle_us"] = {
                        "calls": len(calls),
                        "mean": round(statistics.fmean(calls) * 1000, 1) if calls else None,
                        "median": round(statistics.median(calls) * 1000, 1)
                        if calls else None}
                    # split by the time since the previous call ended: a call soon after
                    # another finds the tracker's code and data still in the caches
                    timed_calls = sorted((r[0] - r[1] / 1000, r[0], r[2]) for r in rec["handle"]
                                         if a <= r[0] <= b)
                    soon: list[float] = []
                    late: list[float] = []
                    for (_s0, end0, _c0), (start, _e, cpu) in itertools.pairwise(timed_calls):
                        (soon if start - end0 < GAP_S else late).append(cpu * 1000)
                    row["handle_us_by_gap"] = {
                        name: [len(v), round(statistics.fmean(v), 1) if v else None,
                               round(statistics.median(v), 1) if v else None]
                        for name, v in (("soon", soon), ("after_gap", late))}
                    row["gc_in_window"] = {
                        str(g): [sum(1 for r in rec["gc"] if a <= r[0] <= b and r[1] == g),
                                 round(sum(r[2] for r in rec["gc"]
                                           if a <= r[0] <= b and r[1] == g), 1)]
                        for g in (0, 1, 2)}
                    row["probe_native"] = rec.get("native")
                shutil.rmtree(probe_dir, ignore_errors=True)
                row["ms_per_fix"] = {role: round(v * 1000 / fixes, 4)
                                     for role, v in row["cpu_s"].items()}
                row["worker_ms_per_fix"] = [round(v * 1000 / fixes, 4)
                                            for v in row["worker_cpu_s"]]
                row["worker_run_ms_per_fix"] = [round(v * 1000 / fixes, 5)
                                                for v in row["worker_run_s"]]
                row["sleeps_per_fix"] = round(row["system_sleeps"] / fixes, 3)
                user, sys_s = row["system_user_sys_s"]
                row["system_user_sys_ms_per_fix"] = [round(user * 1000 / fixes, 4),
                                                     round(sys_s * 1000 / fixes, 4)]
                kinds = row["published_by_kind"]
                row["publishes_per_fix"] = (round(sum(kinds.values()) / fixes, 3)
                                            if kinds else 1.0)
                print(json.dumps(row), flush=True)
                rows.append(row)
    result = {"command": sys.argv, "started_utc": started, "cpu_count": os.cpu_count(),
              "loop_cost": loop_cost(),
              "rate": rate, "seconds": seconds, "repeat": repeat, "systems": systems,
              "broker_nodelay": BROKER_NODELAY, "git": git_state(), "note": note,
              "livematch_from": str(Path(livematch_file()).parent), "steps": rows}
    return publish_result(out, name, result, render_cpu(result))


def publish_result(out: Path, name: str, result: dict[str, Any], text: str
                   ) -> dict[str, Any]:
    """Print the report and write it as ``out/name.md`` beside the raw ``out/name.json``."""
    print(text)
    (out / f"{name}.md").write_text(text, encoding="utf-8")
    (out / f"{name}.json").write_text(json.dumps(result, indent=1), encoding="utf-8")
    return result


def render_cpu(r: dict[str, Any]) -> str:
    rows = r["steps"]
    loads = [row["loadavg_1m"] for row in rows]
    cmd = " ".join(["bench/load.py", *[a for a in r["command"][1:]]])
    git = r["git"]
    lines = [
        f"# CPU time per fix at {r['rate']} fixes/s",
        "",
        f"Command: `.venv/bin/python {cmd}`, started {r['started_utc']} UTC, livematch at "
        f"commit {git['commit']}" + (" with uncommitted changes under livematch/"
                                     if git["livematch_uncommitted"] else "") + "; "
        f"1-minute load average before the steps {min(loads)}-{max(loads)}; "
        f"{r['cpu_count']} cores shared with other people's work. livematch imported "
        f"from `{r['livematch_from']}`." + (f" {r['note']}" if r.get("note") else "")
        + (f" Price of a wake-up on this machine (`--loop-cost`, load average "
           f"{r['loop_cost']['loadavg_1m']}): {r['loop_cost']['blocking_us']} µs of CPU per "
           "turn of an event loop that blocks 1 ms between turns, "
           f"{r['loop_cost']['busy_us']} µs per turn of one that never blocks."
           if r.get("loop_cost") else ""),
        "",
        f"Each step: {r['rate']} vehicles at 1 Hz for {r['seconds']} s "
        f"({r['rate'] * r['seconds']:,} fixes, QoS 1) through a fresh mosquitto; CPU seconds "
        "(user + system, /proc/<pid>/stat) of each process from the start of the step "
        "until its outputs arrived (at most the step + 5 s), divided by the fixes whose "
        "output arrived by then. Warm-up (16 probe vehicles) is excluded"
        + (f"; so is a warm feed of {rows[0].get('warm_feed_s')} s (`--warm-feed`): the "
           "step's vehicles driving before its clock started, while a worker group moved "
           "shards to even its load (reported per step below)"
           if rows and rows[0].get("warm_feed_s") else "") + ". A step with "
        "less than 99 % delivered did not keep up (the machine was too busy): its "
        "figures are less comparable. Publishes per fix: the relay publishes one message per fix; "
        "livematch's count is its own `livematch_published_total` during the step "
        "(assignments, commits, alerts). Every publish also costs a PUBACK read, and "
        "every fix a PUBLISH read and a PUBACK write, in both systems. livematch-1 runs "
        "under the probe of `--profile` (no py-spy), which sums the CPU time of its "
        "thread (`time.thread_time`) inside `Pipeline.handle`, `Pipeline.export_vehicle` "
        "(checkpoints) and `Pipeline.tick` during the step: *pipeline*; *shell* is the "
        "rest of the daemon's CPU (MQTT client, event loop, queues, encoding, metrics). "
        "Wake-ups per fix: voluntary context switches of the system's processes during "
        "the step (/proc/<pid>/task/*/status), divided by the fixes: each time it blocked "
        "waiting for the socket and was woken again.",
        "",
        "| round | system | load avg | delivered | p50 / p99 ms | publishes per fix | "
        "wake-ups per fix | CPU ms per fix: system (user + sys) | of which pipeline: "
        "handle + checkpoints + tick | shell | broker | generators | subscriber |",
        "|---:|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for row in rows:
        m = row["ms_per_fix"]
        u, y = row["system_user_sys_ms_per_fix"]
        pipe = row.get("pipeline_ms_per_fix")
        if pipe:
            total = pipe["handle"] + pipe["export"] + pipe["tick"]
            split = (f"{total:.3f} ({pipe['handle']:.3f} + {pipe['export']:.3f} + "
                     f"{pipe['tick']:.3f}) | {m['system'] - total:.3f}")
        else:
            split = "— | —"
        lines.append(
            f"| {row['repeat']} | {row['system']} | {row['loadavg_1m']} | "
            f"{row['delivered_share']:.1%} | {fmt(row['p50_ms'])} / {fmt(row['p99_ms'])} | "
            f"{row['publishes_per_fix']} | {fmt(row.get('sleeps_per_fix'))} | "
            f"{m['system']:.3f} ({u:.3f} + {y:.3f}) | {split} | "
            f"{m['broker']:.3f} | {m['generators']:.3f} | {m['subscriber']:.3f} |")
    systems = r["systems"]
    med = {s: statistics.median(row["ms_per_fix"]["system"] for row in rows
                                if row["system"] == s) for s in systems}
    lines += ["", "Median CPU ms per fix of the system: " + ", ".join(
        f"{s} {med[s]:.3f}" for s in systems) + "."]
    shells = [row["ms_per_fix"]["system"] - sum(row["pipeline_ms_per_fix"].values())
              for row in rows if row.get("pipeline_ms_per_fix")]
    pipes = [sum(row["pipeline_ms_per_fix"].values()) for row in rows
             if row.get("pipeline_ms_per_fix")]
    if shells:
        lines.append(f"livematch-1: pipeline {statistics.median(pipes):.3f} and shell "
                     f"{statistics.median(shells):.3f} CPU ms per fix (medians).")
    for row in rows:
        calls = row.get("handle_us")
        if calls and calls["calls"]:
            collected = row.get("gc_in_window", {})
            lines.append(
                f"Round {row['repeat']}, {row['system']} ({row.get('probe_native')}): "
                f"`Pipeline.handle` CPU per call mean {calls['mean']} µs, median "
                f"{calls['median']} µs over {calls['calls']:,} calls; collections "
                "during the step, generation 0 / 1 / 2: " + " / ".join(
                    f"{n} ({ms} ms)" for n, ms in collected.values()) + ".")
            gaps = row.get("handle_us_by_gap")
            if gaps:
                lines.append(
                    f"  By the time since the previous call ended: within "
                    f"{GAP_S * 1000:g} ms {gaps['soon'][0]:,} calls, mean {gaps['soon'][1]} / "
                    f"median {gaps['soon'][2]} µs; later {gaps['after_gap'][0]:,} calls, "
                    f"mean {gaps['after_gap'][1]} / median {gaps['after_gap'][2]} µs.")
    lines += _two_worker_lines(r)
    lines += _handle_lines(r)
    if "relay" in systems:
        for s in systems:
            if s == "relay":
                continue
            each = []
            for k in range(1, r["repeat"] + 1):
                a = [row for row in rows if row["repeat"] == k and row["system"] == s]
                b = [row for row in rows if row["repeat"] == k and row["system"] == "relay"]
                if a and b and b[0]["ms_per_fix"]["system"] > 0:
                    each.append(a[0]["ms_per_fix"]["system"] / b[0]["ms_per_fix"]["system"])
            if each:
                lines.append(f"{s} / relay, CPU per fix within each round: "
                             + ", ".join(f"{x:.2f}" for x in each)
                             + f" (median {statistics.median(each):.2f}); the CPU-bound "
                             f"throughput ratio is about the inverse, "
                             f"{1 / statistics.median(each):.2f}.")
    return "\n".join(lines) + "\n"


def _two_worker_lines(r: dict[str, Any]) -> list[str]:
    """What the CPU per fix of each worker predicts for two workers on two free cores.

    At the same total rate, one worker (livematch-1) uses c1 CPU seconds per fix of
    the feed; in a group of two each worker uses its own share of CPU per fix of the
    *whole* feed (w0, w1: each receives every fix, matches its shards' and keeps the
    others'). A worker that is CPU-bound on a core of its own handles at most
    1 / c1 fixes/s alone; in the group the busier worker saturates first, at
    1 / max(w0, w1) fixes/s of the whole feed. So two workers, each on a free core,
    reach c1 / max(w0, w1) times one worker's throughput (the broker, the generators
    and the store on other cores; both measured at the same offered rate, within one
    round). A throughput search cannot show it on 2 cores that also run the broker
    and the generators. Empty when the run has no livematch-1 or no two-worker system.
    """
    rows = r["steps"]
    out = []
    for s in [s for s in r["systems"] if s.startswith("livematch-2sk")]:
        each = [row["worker_ms_per_fix"] for row in rows if row["system"] == s
                and len(row.get("worker_ms_per_fix") or []) == 2]
        if each:
            out.append(
                f"{s} (every fix of a shard w1 holds, w0 only keeps them): CPU ms per fix "
                "of w0 (kept) / w1 (matched), per round: "
                + ", ".join(f"{k:.3f} / {m:.3f}" for k, m in each)
                + f"; medians {statistics.median(k for k, _ in each):.3f} / "
                f"{statistics.median(m for _, m in each):.3f}.")
    out += _standby_cost_lines(r)
    pairs = [s for s in r["systems"] if s.partition("*")[0] in (
        "livematch-2", "livematch-2s", "livematch-2s1", "livematch-2s0", "livematch-2sc",
        "livematch-2scu", "livematch-1p")]
    # livematch-1 runs under the probe (unless --no-probe); livematch-1n never does
    ones = [s for s in ("livematch-1", "livematch-1n") if s in r["systems"]]
    for single, s in [(o, s) for o in ones for s in pairs]:
        each = []
        each_run = []  # the same from schedstat run time (ns), not 10 ms clock ticks
        shares: list[str] = []
        for k in range(1, r["repeat"] + 1):
            one = [row for row in rows if row["repeat"] == k and row["system"] == single]
            two = [row for row in rows if row["repeat"] == k and row["system"] == s]
            if one and two and len(two[0].get("worker_ms_per_fix") or []) == 2:
                w = two[0]["worker_ms_per_fix"]
                each.append((one[0]["ms_per_fix"]["system"], w[0], w[1]))
                run1 = one[0].get("worker_run_ms_per_fix") or []
                run2 = two[0].get("worker_run_ms_per_fix") or []
                if run1 and len(run2) == 2 and min(run2) > 0:
                    each_run.append((sum(run1), run2[0], run2[1]))
                held = two[0].get("worker_shards_held")
                got = two[0].get("worker_received")
                if held and got and None not in held:
                    warm = two[0].get("worker_received_warm")
                    moved = two[0].get("worker_takeovers")
                    matched = two[0].get("worker_matched") or [0.0, 0.0]
                    shares.append(f"{held[0]:.0f} / {held[1]:.0f} shards, "
                                  f"{got[0]:.0f} / {got[1]:.0f} messages, "
                                  f"{matched[0]:.0f} / {matched[1]:.0f} matched"
                                  + (f" (warm feed: {warm[0]:.0f} / {warm[1]:.0f} messages, "
                                     f"{two[0].get('load_snapshots') or 0:.0f} load "
                                     f"snapshot(s); shards taken over in the window "
                                     f"{moved[0]:.0f} / {moved[1]:.0f})"
                                     if warm and moved else ""))
        if each:
            ratios = [c1 / max(w0, w1) for c1, w0, w1 in each]
            out.append(
                f"{s}: CPU ms per fix of the whole feed, one worker ({single}) vs each of "
                "the two, per round: " + ", ".join(f"{c1:.3f} vs {w0:.3f} / {w1:.3f}"
                                          for c1, w0, w1 in each)
                + "; predicted throughput of two workers on two free cores, c1 / max(w0, "
                f"w1): {', '.join(f'{x:.2f}' for x in ratios)} (median "
                f"{statistics.median(ratios):.2f}) times one worker's (goal >= 1.6)."
                + (" Held at the end of the step, received and matched during it, w0 / w1, per "
                   "round: " + "; ".join(shares) + "." if shares else ""))
        if each_run:
            ratios = [c1 / max(w0, w1) for c1, w0, w1 in each_run]
            out.append(
                f"{s} against {single}, the same from the scheduler's run time of each "
                "process's threads "
                "(ns, `/proc/PID/task/*/schedstat`; not quantized to 10 ms ticks): CPU ms "
                "per fix, one worker vs each of the two, per round: "
                + ", ".join(f"{c1:.4f} vs {w0:.4f} / {w1:.4f}" for c1, w0, w1 in each_run)
                + f"; c1 / max(w0, w1): {', '.join(f'{x:.3f}' for x in ratios)} (median "
                f"{statistics.median(ratios):.3f}).")
    return out


def _handle_lines(r: dict[str, Any]) -> list[str]:
    """Each probed worker's ``Pipeline.handle`` calls (``--probe-groups``), per step.

    µs of thread CPU per call, all calls and split by the gap since that worker's
    previous call (``handle_stats``), and ``handle`` CPU per fix the worker matched.
    """
    out = []
    for row in r["steps"]:
        for k, h in enumerate(row.get("worker_handle") or []):
            if not h["calls"]:
                continue
            soon, late = h["soon"], h["after_gap"]
            out.append(
                f"| {row['repeat']} | {row['system']} | w{k} | {row['loadavg_1m']} | "
                f"{h['calls']:,} | {h['ms'] / h['calls'] * 1000:.1f} / {fmt(h['median'])} | "
                f"{soon[0] / max(1, soon[0] + late[0]):.1%} | {fmt(soon[1])} / "
                f"{fmt(soon[2])} | {fmt(late[1])} / {fmt(late[2])} |")
    if not out:
        return []
    return ["", "`Pipeline.handle` in every probed worker (`--probe-groups`): thread CPU "
            f"per call; *soon*: within {GAP_S * 1000:g} ms of the worker's previous call's "
            "end; *after a gap*: later.", "",
            "| round | system | worker | load avg | calls | µs per call mean / median | "
            "soon | soon: mean / median µs | after a gap: mean / median µs |",
            "|---:|---|---|---:|---:|---:|---:|---:|---:|", *out, ""]


def _standby_cost_lines(r: dict[str, Any]) -> list[str]:
    """What standing by costs a worker, from ``livematch-2sm`` next to ``livematch-2s0``.

    In ``livematch-2sm`` w0 stands by for w1's shards and w1 for none; in
    ``livematch-2s0`` neither does. Both steps match the same vehicles on the same
    workers, so w0 / w1 in ``livematch-2s0`` is the pair's own imbalance (w0 holds a few
    more vehicles), and (w0 / w1 in ``livematch-2sm``) / (w0 / w1 in ``livematch-2s0``)
    - 1 is what standing by adds to w0's CPU: each ratio is taken within one step, so
    the machine's drift between steps cancels (both workers share it), unlike
    ``livematch-2s`` against ``livematch-2s0``, whose steps run a minute apart. The added
    CPU per fix of the whole feed is w0 - w1 x (w0 / w1 without standbys), from the
    ``livematch-2sm`` step. The same for ``livematch-2smc`` (w0 stands by on a second
    connection, ``group.standby_connection``). Empty without ``livematch-2s0``.
    """
    out: list[str] = []
    for (mixed, field) in [(m, f) for m in ("livematch-2sm", "livematch-2smc")
                           for f in ("worker_ms_per_fix", "worker_run_ms_per_fix")]:
        if not {mixed, "livematch-2s0"} <= set(r["systems"]):
            continue
        each = []
        for k in range(1, r["repeat"] + 1):
            got = {}
            for row in r["steps"]:
                w = row.get(field) or []
                if row["repeat"] == k and row["system"] in (mixed, "livematch-2s0") \
                        and len(w) == 2 and min(w) > 0:
                    got[row["system"]] = w
            if len(got) == 2:
                (m0, m1), (z0, z1) = got[mixed], got["livematch-2s0"]
                base = z0 / z1
                each.append(((m0 / m1) / base - 1, m0 - m1 * base))
        if not each:
            continue
        how = " on a second connection" if mixed.endswith("c") else ""
        clock = (" (the scheduler's run time of each worker's threads, ns, "
                 "`/proc/PID/task/*/schedstat`)" if field == "worker_run_ms_per_fix"
                 else "")
        out.append(
            f"{mixed} against livematch-2s0 (w0 stands by for w1's shards{how} in the "
            f"first, neither in the second): what standing by adds to w0's CPU{clock}, "
            "(w0 / w1 with) / (w0 / w1 without) - 1, per round: "
            + ", ".join(f"{x:+.1%}" for x, _ in each)
            + f" (median {statistics.median(x for x, _ in each):+.1%}); in CPU ms per fix "
            "of the whole feed: " + ", ".join(f"{d:+.3f}" for _, d in each)
            + f" (median {statistics.median(d for _, d in each):+.3f}).")
    return out


# ---------------------------------------------------------------- the profile mode
def _spans(rows: list[tuple[float, float]], gap_ms: float) -> list[tuple[float, float, int]]:
    """Calls closer than ``gap_ms`` merged: (start epoch s, summed ms, calls)."""
    out: list[tuple[float, float, int]] = []
    for at, ms in sorted(rows):
        start = at - ms / 1000
        if out and start - out[-1][0] - out[-1][1] / 1000 <= gap_ms / 1000:
            s0, total, n = out[-1]
            out[-1] = (s0, total + ms, n + 1)
        else:
            out.append((start, ms, 1))
    return out


def collapsed_stacks(path: Path) -> Iterator[tuple[str, int]]:
    """The (stack, samples) lines of a py-spy collapsed (``--format raw``) file."""
    for line in path.read_text(encoding="utf-8").splitlines():
        stack, _, count = line.rpartition(" ")
        if stack:
            yield stack, int(count)


def _stack_table(path: Path, top: int) -> dict[str, list[tuple[str, float]]]:
    """py-spy collapsed stacks: the functions with most samples, self and inclusive."""
    own: dict[str, int] = {}
    incl: dict[str, int] = {}
    total = 0
    for stack, n in collapsed_stacks(path):
        total += n
        frames = [f.split(" (")[0] + " (" + f.split(" (")[-1].split(":")[0].split("/")[-1]
                  + ")" if " (" in f else f for f in stack.split(";")[1:]]
        if frames:
            own[frames[-1]] = own.get(frames[-1], 0) + n
        for f in set(frames):
            incl[f] = incl.get(f, 0) + n

    def share(d: dict[str, int]) -> list[tuple[str, float]]:
        return [(k, round(v / total, 3)) for k, v in sorted(d.items(), key=lambda kv: -kv[1])
                [:top]]
    return {"samples": [("all", float(total))], "self": share(own), "inclusive": share(incl)}


def profile(rate: int, seconds: int, generators: int, nodelay: bool, freeze: bool,
            inflight: int, py_spy: bool, out: Path, name: str) -> dict[str, Any]:
    """One livematch-1 step under the probes (and py-spy): where the time and p99 go."""
    with tempfile.TemporaryDirectory(prefix="lm-profile-") as tmp:
        folder = Path(tmp)
        pool = folder / "pool.npz"
        make_pool(pool)
        row = run_step("livematch-1", rate, seconds, generators, pool, probe_to=folder,
                       nodelay=nodelay, freeze=freeze, inflight=inflight, py_spy=py_spy)
        rec = json.loads((folder / "probe.w0.json").read_text(encoding="utf-8"))
        fixes = json.loads((folder / "fixes.json").read_text(encoding="utf-8"))
        stacks = (_stack_table(folder / "py-spy.txt", 25)
                  if (folder / "py-spy.txt").exists() else None)
    t0 = fixes["t0"]
    lo, hi = t0, t0 + seconds + GRACE_S

    def within(rows: list[list[float]]) -> list[list[float]]:
        return [r for r in rows if lo <= r[0] <= hi]

    handle = sorted(r[1] for r in within(rec["handle"]))
    exports = [(r[0], r[1]) for r in within(rec["export"])]
    bursts = _spans(exports, 5.0)
    gcs = within(rec["gc"])
    stalls = sorted(within(rec["stall"]), key=lambda r: -r[1])
    slow = [(ft, at - ft) for ft, at in fixes["fixes"] if at - ft >= 0.1]
    window = [(r[0] - r[1] / 1000, r[0]) for r in stalls]

    def during(t: float, rows: list[tuple[float, float]]) -> bool:
        return any(a <= t <= b for a, b in rows)

    slow_in_stall = sum(1 for ft, lat in slow
                        if any(ft <= b and ft + lat >= a for a, b in window))

    def overlaps(a: float, b: float) -> dict[str, Any]:
        return {"gc_ms": round(sum(g[2] for g in gcs if a <= g[0] <= b + 0.001), 1),
                "gc_gen2": sum(1 for g in gcs if g[1] == 2 and a <= g[0] <= b + 0.001),
                "export_ms": round(sum(ms for at, ms in exports if a <= at <= b + 0.001), 1),
                "exports": sum(1 for at, _ in exports if a <= at <= b + 0.001),
                "handle_ms": round(sum(r[1] for r in within(rec["handle"])
                                       if a <= r[0] <= b + 0.001), 1)}

    lat = sorted(at - ft for ft, at in fixes["fixes"])
    result = {
        "rate": rate, "seconds": seconds, "git": git_state(), "nodelay": nodelay,
        "freeze": freeze, "broker_nodelay": BROKER_NODELAY,
        "inflight": inflight,
        "objects_at_exit": rec.get("objects_at_exit"), "step": row,
        "latency_ms": {"p50": percentile(lat, 0.5), "p99": percentile(lat, 0.99),
                       "max": percentile(lat, 1.0), "fixes": len(lat),
                       ">=100ms": len(slow), "of them waiting out a loop stall": slow_in_stall},
        "handle_ms": {"calls": len(handle), "p50": round(handle[len(handle) // 2], 3),
                      "p99": round(handle[int(0.99 * (len(handle) - 1))], 2),
                      "max": round(handle[-1], 1), "busy_share": round(
                          sum(handle) / 1000 / (seconds + GRACE_S), 3)} if handle else {},
        "checkpoint": {"exports": len(exports),
                       "export_ms_mean": round(sum(ms for _, ms in exports)
                                               / max(1, len(exports)), 3),
                       "bursts": len(bursts),
                       "largest_bursts": [(round(a - t0, 2), round(ms, 1), n) for a, ms, n in
                                          sorted(bursts, key=lambda b: -b[1])[:5]]},
        "gc": {str(g): {"count": sum(1 for r in gcs if r[1] == g),
                        "total_ms": round(sum(r[2] for r in gcs if r[1] == g), 1),
                        "max_ms": round(max([r[2] for r in gcs if r[1] == g] or [0.0]), 1)}
               for g in (0, 1, 2)},
        "stalls": {"count": len(stalls), "total_ms": round(sum(r[1] for r in stalls), 1),
                   "worst": [{"at_s": round(r[0] - r[1] / 1000 - t0, 2),
                              "ms": round(r[1], 1),
                              **overlaps(r[0] - r[1] / 1000, r[0])} for r in stalls[:10]]},
        "py_spy": stacks,
    }
    return publish_result(out, name, result, render_profile(result))


def render_profile(r: dict[str, Any]) -> str:
    step = r["step"]
    lines = [f"# One livematch worker at {r['rate']} fixes/s under probes",
             "",
             f"Command: `.venv/bin/python bench/load.py --profile {r['rate']} --seconds "
             f"{r['seconds']}{' --nodelay' if r['nodelay'] else ''}"
             f"{' --freeze' if r['freeze'] else ''}"
             f"{' --inflight ' + str(r['inflight']) if r['inflight'] else ''}"
             f"{' --broker-nodelay' if BROKER_NODELAY else ''} --py-spy`; "
             "load average "
             f"{step['loadavg_1m']} before the step; {os.cpu_count()} cores shared with the "
             "broker, generators, subscriber and other people's work. TCP_NODELAY on the "
             f"daemon's MQTT socket: {'set by the probe' if r['nodelay'] else 'no (as shipped)'}"
             f"; gc.freeze() after start: {'yes' if r['freeze'] else 'no (as shipped)'}; "
             f"QoS 1 publishes in flight: {r['inflight'] or '20 (paho default, as shipped)'}.",
             "",
             "```json",
             json.dumps({k: v for k, v in r.items() if k not in ("step", "py_spy")}, indent=1),
             "```", ""]
    if r["py_spy"]:
        lines += ["py-spy (200 Hz, idle excluded): share of samples", "",
                  "| self | share | inclusive | share |", "|---|---:|---|---:|"]
        for (a, x), (b, y) in zip(r["py_spy"]["self"], r["py_spy"]["inclusive"], strict=False):
            lines.append(f"| {a} | {x:.1%} | {b} | {y:.1%} |")
    return "\n".join(lines) + "\n"


def livematch_file() -> str:
    """Where the livematch package the daemons run comes from (PYTHONPATH decides)."""
    import livematch

    return str(livematch.__file__)


def git_state() -> dict[str, str]:
    def git(*args: str) -> str:
        return subprocess.run(["git", *args], cwd=ROOT, capture_output=True, text=True,
                              check=False).stdout.strip()

    return {"commit": git("rev-parse", "--short", "HEAD"),
            "livematch_uncommitted": git("status", "--porcelain", "--", "livematch")}


def fmt(value: Any) -> str:
    return "—" if value is None else str(value)


def report(args: argparse.Namespace, rows: list[dict[str, Any]],
           ceilings: list[dict[str, Any]], half: list[dict[str, Any]],
           git: dict[str, str], started: str) -> str:
    systems = list(dict.fromkeys(c["system"] for c in ceilings))
    # a search whose first step already failed counts as 0 ("below the lowest rate")
    found: dict[str, list[int]] = {
        s: [c["max_sustained_per_s"] or 0 for c in ceilings if c["system"] == s]
        for s in systems}
    by = {s: statistics.median_low(v) if v else None for s, v in found.items()}
    lowest = min(int(v) for v in args.rates.split(","))

    def ratio(a: str, b: str) -> str:
        if not (by.get(a) and by.get(b)):
            return "—" if a not in by or b not in by else (
                f"< {lowest / by[b]:.2f}" if by.get(b) else "—")
        each = []
        for k in sorted({c["repeat"] for c in ceilings}):
            got = {c["system"]: c["max_sustained_per_s"] for c in ceilings if c["repeat"] == k}
            if got.get(a) and got.get(b):
                each.append(f"{got[a] / got[b]:.2f}")
        per = f" (each repeat: {', '.join(each)})" if len(each) > 1 else ""
        return f"{by[a] / by[b]:.2f}{per}"

    cmd = (f"bench/load.py --rates {args.rates} --seconds {args.seconds} --systems "
           f"{args.systems} --generators {args.generators} --refine {args.refine} "
           f"--repeat {args.repeat} --half-repeats {args.half_repeats}"
           + (" --broker-nodelay" if args.broker_nodelay else ""))
    lines = [
        "# End-to-end load through mosquitto on loopback",
        "",
        f"Command: `.venv/bin/python {cmd}`, started {started} UTC, livematch at commit "
        f"{git['commit']}" + (" with uncommitted changes under livematch/ (others' work "
                              "in progress)" if git["livematch_uncommitted"] else "") + ".",
        "",
        f"Machine: {os.cpu_count()} cores, shared by the broker, the generators, the "
        "subscriber and the system under test (and by other people's work: the 1-minute "
        "load average before each step is in the tables, and the CPU pressure, the share "
        "of the last 10 s in which some runnable task waited for a CPU, from "
        "/proc/pressure/cpu). Each vehicle sends one fix per "
        "second (QoS 1); latency is from the fix's own time (stamped when it is handed to "
        "the MQTT client) to its output arriving at the subscriber. Sustained = generator "
        f"kept its schedule, >= 99 % delivered by the end + {GRACE_S:g} s, median latency of "
        f"the last third of the step at most {MAX_GROWTH_MS:g} ms above the first third's, "
        f"p99 <= {MAX_P99_MS:g} ms. Broker: mosquitto with TCP_NODELAY "
        f"{'on (--broker-nodelay)' if args.broker_nodelay else 'off (its default)'}.",
        "",
        "## Ceilings",
        "",
        "| repeat | system | max sustained fixes/s | first failed | load avg during the "
        "search | note |",
        "|---:|---|---:|---:|---|---|",
    ]
    harness = by.get("direct")
    start = 0
    for c in ceilings:
        mine = rows[start:start + c["steps"]]
        start += c["steps"]
        loads = [r["loadavg_1m"] for r in mine]
        note = "generator-bound: the harness, not the system, stopped the search" \
            if c["generator_bound"] else ""
        if (c["system"] != "direct" and harness and c["max_sustained_per_s"]
                and c["max_sustained_per_s"] >= harness):
            note = "at the harness's own ceiling (direct): a lower bound"
        top = c["max_sustained_per_s"] or f"< {lowest}"
        lines.append(f"| {c['repeat']} | {c['system']} | {top} | "
                     f"{fmt(c['first_failed_per_s'])} | {min(loads)}-{max(loads)} | {note} |")
    lines += ["", "Median of the repeats (a search that failed at its first step counts as "
              "below it): " + ", ".join(
                  f"{s} {by[s] if by[s] else f'< {lowest}'}" for s in systems) + " fixes/s."]
    lines += [
        "",
        f"livematch-1 / relay: {ratio('livematch-1', 'relay')} (goal >= 0.80); "
        f"livematch-2 / livematch-1: {ratio('livematch-2', 'livematch-1')}; livematch-2s / "
        f"livematch-1: {ratio('livematch-2s', 'livematch-1')} (goal >= 1.6, not reachable "
        "when both workers share 2 cores with everything else).",
        "",
    ]
    if half:
        lines += [f"## livematch-1 at half of its maximum ({half[0]['offered_per_s']} fixes/s)",
                  "", "| run | load avg | delivered | p50 ms | p99 ms | growth ms | sustained |",
                  "|---:|---:|---:|---:|---:|---:|---|"]
        for k, r in enumerate(half, 1):
            lines.append(f"| {k} | {r['loadavg_1m']} | {r['delivered_share']:.1%} | "
                         f"{fmt(r['p50_ms'])} | {fmt(r['p99_ms'])} | {fmt(r['growth_ms'])} | "
                         f"{'yes' if r['sustained'] else 'no'} |")
        p50s = [r["p50_ms"] for r in half if r["p50_ms"] is not None]
        p99s = [r["p99_ms"] for r in half if r["p99_ms"] is not None]
        if p50s and p99s:
            lines += ["", f"Median of the runs: p50 {statistics.median(p50s)} ms, p99 "
                          f"{statistics.median(p99s)} ms (goal p99 <= 100 ms)."]
        lines.append("")
    lines += [
        "## Every step",
        "",
        "| repeat | system | offered/s | load avg (CPU pressure %) | generator/s (lag p99 ms) | "
        "received/s in step | "
        "delivered | p50 ms | p99 ms | p50 first / last third ms | CPU s: system / broker "
        "/ generators / subscriber | verdict |",
        "|---:|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---|",
    ]
    for r in rows:
        c = r["cpu_s"]
        lines.append(
            f"| {r.get('repeat', 1)} | {r['system']} | {r['offered_per_s']} | {r['loadavg_1m']} "
            f"({fmt(r.get('cpu_pressure_10s'))}) | "
            f"{r['generator_per_s']} ({r['generator_lag_p99_ms']}) | "
            f"{r['received_in_run_per_s']} | {r['delivered_share']:.1%} | {fmt(r['p50_ms'])} | "
            f"{fmt(r['p99_ms'])} | {fmt(r['p50_first_third_ms'])} / "
            f"{fmt(r['p50_last_third_ms'])} | {c['system']} / {c['broker']} / "
            f"{c['generators']} / {c['subscriber']} | {r['verdict']} |")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--role", choices=("bench", "generator", "relay"), default="bench")
    ap.add_argument("--port", type=int, default=0)
    ap.add_argument("--pool", default="")
    ap.add_argument("--n", type=int, default=0)
    ap.add_argument("--first", type=int, default=0)
    ap.add_argument("--step", type=int, default=1)
    ap.add_argument("--shards", type=int, default=0)
    ap.add_argument("--only-shards", default="")
    ap.add_argument("--among", action="store_true")
    ap.add_argument("--split", action="store_true")
    ap.add_argument("--rates", default="250,500,1000,2000,4000,8000,16000",
                    help="offered fixes/s to step through (= vehicles at 1 Hz)")
    ap.add_argument("--seconds", type=int, default=10, help="length of each step")
    ap.add_argument("--systems", default="direct,relay,livematch-1,livematch-2,livematch-2s")
    ap.add_argument("--generators", type=int, default=2, help="generator processes")
    ap.add_argument("--refine", type=int, default=2,
                    help="bisections between the last sustained and the first failed step")
    ap.add_argument("--repeat", type=int, default=1,
                    help="search every system's ceiling this many times (systems in turn)")
    ap.add_argument("--half-repeats", type=int, default=3,
                    help="runs of livematch-1 at half of its maximum")
    ap.add_argument("--profile", type=int, default=0, metavar="RATE",
                    help="instead of the search: one livematch-1 step at RATE under probes")
    ap.add_argument("--nodelay", action="store_true",
                    help="with --profile: set TCP_NODELAY on the daemon's MQTT socket")
    ap.add_argument("--freeze", action="store_true",
                    help="with --profile: gc.freeze() in the daemon once it runs")
    ap.add_argument("--inflight", type=int, default=0,
                    help="with --profile: QoS 1 publishes the daemon keeps in flight")
    ap.add_argument("--py-spy", action="store_true",
                    help="with --profile: sample the daemon with py-spy (pip install py-spy)")
    ap.add_argument("--broker-nodelay", action="store_true",
                    help="mosquitto with set_tcp_nodelay true (its default is false)")
    ap.add_argument("--cpu-per-fix", type=int, default=0, metavar="RATE",
                    help="instead of the search: CPU time per fix of each process at RATE, "
                         "the --systems in turn (default relay,livematch-1), --repeat rounds")
    ap.add_argument("--cprofile", default="",
                    help="with --cpu-per-fix: run every livematch worker under cProfile, "
                         "writing <system>.<rate>.w<k>.<time>.prof into this folder (call "
                         "counts per fix; the profiler's own cost makes the CPU figures "
                         "unusable)")
    ap.add_argument("--py-spy-to", default="",
                    help="with --cpu-per-fix: sample every livematch worker of each step "
                         "with py-spy (the thread holding the GIL, without pausing the "
                         "process), raw collapsed stacks into this folder as "
                         "<system>.<rate>.w<k>.<time>.txt (its CPU figures then include "
                         "the sampling's own cost; bench/spyshares.py sums them)")
    ap.add_argument("--py-spy-rate", type=int, default=200,
                    help="with --py-spy-to: samples a second")
    ap.add_argument("--no-probe", action="store_true",
                    help="with --cpu-per-fix: run livematch-1 without the probe (its "
                         "timers cost CPU the other systems do not pay; no pipeline split)")
    ap.add_argument("--probe-groups", action="store_true",
                    help="with --cpu-per-fix: every livematch worker under the probe, not "
                         "only livematch-1's; each worker's Pipeline.handle calls reported "
                         "(CPU per call, split by the gap since the previous call)")
    ap.add_argument("--name", default="",
                    help="with --cpu-per-fix: result file stem (default load.cpu-RATE)")
    ap.add_argument("--note", default="",
                    help="with --cpu-per-fix: a sentence for the report (which code ran)")
    ap.add_argument("--loop-cost", action="store_true",
                    help="only print the CPU per event-loop turn that blocks 1 ms vs one "
                         "that never blocks (the price of a wake-up on this machine)")
    ap.add_argument("--kept-cost", action="store_true",
                    help="only print the thread CPU per message a group worker only keeps "
                         "(another worker's shard), without broker or socket")
    ap.add_argument("--shell-cost", action="store_true",
                    help="only print fixed costs of the daemon's shell (a drain that finds "
                         "nothing, the trim step of a round, encoding a record), "
                         "without broker")
    ap.add_argument("--checkpoint-cost", action="store_true",
                    help="only print the thread CPU of a group worker's checkpoint round "
                         "(32 shards through Redis) and of its packing, without broker")
    ap.add_argument("--warm-feed", type=int, default=0, metavar="S",
                    help="feed each step's vehicles S seconds before its clock starts "
                         "(a worker group settles its load snapshot meanwhile)")
    ap.add_argument("--kept-rounds", type=int, default=20,
                    help="with --kept-cost: messages per vehicle (the first of each "
                         "vehicle's topic takes the slower way; 10 as in a 10 s step)")
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"))
    argv = sys.argv[1:] if argv is None else argv
    if argv[:1] == ["--render"]:  # re-render load.md from load.json (after a report fix)
        saved = json.loads(Path(argv[1]).read_text(encoding="utf-8"))
        old_args = ap.parse_args([a for a in saved["command"][1:]])
        old_args.broker_nodelay = saved.get("broker_nodelay", False)
        text = report(old_args, saved["steps"], saved["ceilings"], saved["half_load"],
                      saved["git"], saved["started_utc"])
        Path(argv[1]).with_suffix(".md").write_text(text, encoding="utf-8")
        print(text)
        return 0
    if argv[:2] == ["--role", "probe"]:  # --probe-out PATH [--nodelay] <livematch args>
        rest = argv[4:]
        opts = set()
        inflight = 0
        while rest and rest[0] in {"--nodelay", "--freeze", "--inflight"}:
            flag = rest.pop(0)
            if flag == "--inflight":
                inflight = int(rest.pop(0))
            opts.add(flag)
        return probe(rest, argv[3], "--nodelay" in opts, "--freeze" in opts, inflight)
    args = ap.parse_args(argv)
    if args.loop_cost:
        print(json.dumps(loop_cost()))
        return 0
    if args.kept_cost:
        print(json.dumps(kept_cost(rounds=args.kept_rounds)))
        return 0
    if args.shell_cost:
        print(json.dumps(shell_cost()))
        return 0
    if args.checkpoint_cost:
        print(json.dumps(checkpoint_cost()))
        return 0
    global BROKER_NODELAY, WARM_FEED_S
    BROKER_NODELAY = args.broker_nodelay
    WARM_FEED_S = args.warm_feed
    if WARM_FEED_S and WARM_FEED_S + args.seconds > 70:
        ap.error("--warm-feed + --seconds must be at most 70 (the pool's drives are "
                 f"{POOL_SECONDS} + 70 s, a vehicle starts up to {POOL_SECONDS - 1} s in)")
    if args.profile:
        out = Path(args.out)
        out.mkdir(parents=True, exist_ok=True)
        name = f"load.profile-{args.profile}" + ("-nodelay" if args.nodelay else "") + (
            "-brokernodelay" if args.broker_nodelay else "") + (
            "-freeze" if args.freeze else "") + (
            f"-inflight{args.inflight}" if args.inflight else "")
        profile(args.profile, args.seconds, args.generators, args.nodelay, args.freeze,
                args.inflight, args.py_spy, out, name)
        return 0
    if args.cpu_per_fix:
        global CPROFILE_TO, SPY_TO, SPY_RATE
        if args.cprofile:
            CPROFILE_TO = Path(args.cprofile)
            CPROFILE_TO.mkdir(parents=True, exist_ok=True)
        if args.py_spy_to:
            SPY_TO = Path(args.py_spy_to)
            SPY_TO.mkdir(parents=True, exist_ok=True)
            SPY_RATE = args.py_spy_rate
        out = Path(args.out)
        out.mkdir(parents=True, exist_ok=True)
        systems = (args.systems.split(",") if "--systems" in argv
                   else ["relay", "livematch-1"])
        cpu_per_fix(args.cpu_per_fix, args.seconds, args.repeat, args.generators, systems,
                    out, args.name or f"load.cpu-{args.cpu_per_fix}", args.note,
                    probe=not args.no_probe, probe_all=args.probe_groups)
        return 0
    if args.role == "generator":
        generate(args.port, args.pool, args.n, args.seconds, args.first, args.step,
                 args.shards, args.only_shards, args.among, args.split)
        return 0
    if args.role == "relay":
        with contextlib.suppress(KeyboardInterrupt):
            asyncio.run(relay(args.port, IN_TOPIC))
        return 0
    started = time.strftime("%Y-%m-%d %H:%M", time.gmtime())
    git = git_state()
    rates = [int(v) for v in args.rates.split(",")]
    rows: list[dict[str, Any]] = []
    ceilings: list[dict[str, Any]] = []
    half: list[dict[str, Any]] = []
    systems = args.systems.split(",")
    with tempfile.TemporaryDirectory(prefix="lm-pool-") as tmp:
        pool = Path(tmp) / "pool.npz"
        make_pool(pool)
        for repeat in range(1, args.repeat + 1):
            for system in systems:
                found = ceiling(system, rates, args.refine, args.seconds, args.generators,
                                pool, rows)
                ceilings.append({"repeat": repeat, **found})
                for row in rows:
                    row.setdefault("repeat", repeat)
        tops = [c["max_sustained_per_s"] for c in ceilings
                if c["system"] == "livematch-1" and c["max_sustained_per_s"]]
        top = int(statistics.median(tops)) if tops else None
        if top:
            for _ in range(args.half_repeats):
                row = run_step("livematch-1", top // 2, args.seconds, args.generators, pool)
                print(json.dumps(row), flush=True)
                half.append(row)
    text = report(args, rows, ceilings, half, git, started)
    print(text)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "load.md").write_text(text, encoding="utf-8")
    (out / "load.json").write_text(json.dumps(
        {"command": sys.argv, "started_utc": started, "cpu_count": os.cpu_count(),
         "broker_nodelay": args.broker_nodelay,
         "git": git, "ceilings": ceilings, "half_load": half, "steps": rows}, indent=1),
        encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
