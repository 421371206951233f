"""Real mosquitto and redis-server for the daemon's tests, and helpers to drive them.

The servers run on free loopback ports, each with a generated config in a temporary
folder, and are stopped after use (fixtures in ``fixtures_services.py``, loaded with
``pytest_plugins = ("fixtures_services",)``). Each test gets its own topic and key
prefix, so tests sharing a server never see each other's messages or keys.
"""

from __future__ import annotations

import asyncio
import contextlib
import getpass
import inspect
import json
import logging
import os
import random
import shutil
import signal
import socket
import ssl
import subprocess
import time
import uuid
from collections.abc import AsyncIterator, Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import aiomqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from livematch.core.build import Road, network_from_roads
from livematch.core.geometry import Projection
from livematch.core.network import RoadNetwork

MOSQUITTO = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
MOSQUITTO_PASSWD = shutil.which("mosquitto_passwd") or "/usr/bin/mosquitto_passwd"
REDIS_SERVER = shutil.which("redis-server") or "/usr/bin/redis-server"

#: Upper bound of a wait for something a test expects to happen (a daemon ready, a
#: message seen, a log line written). Generous on purpose: CI's 2-core machine may be
#: busy (load 6-13 made 1.5-10 s waits fail, docs/measured.md "Session 29 (flaky29)"),
#: and a wait ends as soon as its condition holds, so a passing test never waits it out.
WAIT_S = 120.0


def _ephemeral_range() -> tuple[int, int]:
    """The kernel's range for outgoing connections' local ports (Linux default otherwise)."""
    try:
        low, high = Path("/proc/sys/net/ipv4/ip_local_port_range").read_text().split()
        return int(low), int(high)
    except (OSError, ValueError):
        return 32768, 60999


#: Ports :func:`free_port` has handed out in this process: never handed out twice.
_GIVEN: set[int] = set()


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nobody listens on right now, outside the ephemeral range.

    A port from ``bind(0)`` lies in the range the kernel also gives outgoing connections
    (every MQTT and Redis client of a test takes one), so between this call and the
    server's own bind a client could take it: a worker then failed with "address already
    in use". Ports below (or above) that range are only taken by listeners. A port is
    never handed out twice in one process: two calls made before either server binds
    (two workers' metrics ports) once drew the same random port, and the second worker
    failed with "address already in use" (session 32's CI run).
    """
    low, high = _ephemeral_range()
    candidates = [p for p in (*range(20000, low), *range(high + 1, 65536))
                  if p >= 1024 and p not in _GIVEN]
    rng = random.Random(os.getpid() ^ time.monotonic_ns())
    for port in rng.sample(candidates, min(200, len(candidates))):
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            try:
                s.bind(("127.0.0.1", port))
            except OSError:
                continue
            _GIVEN.add(port)
            return port
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:  # all taken: any port
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_listening(port: int, proc: subprocess.Popen[bytes], timeout: float = 10.0) -> None:
    """Block until something accepts on 127.0.0.1:port (or the process died)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise RuntimeError(f"server on port {port} exited with {proc.returncode}")
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            s.settimeout(0.2)
            if s.connect_ex(("127.0.0.1", port)) == 0:
                return
        time.sleep(0.02)
    raise RuntimeError(f"nothing listens on 127.0.0.1:{port} after {timeout} s")


@dataclass
class Mosquitto:
    """A mosquitto 2.x broker with persistence, startable and stoppable on one port."""

    folder: Path
    port: int = field(default_factory=free_port)
    proc: subprocess.Popen[bytes] | None = None
    users: dict[str, str] = field(default_factory=dict)  # empty: anonymous access
    tls: bool = False  # TLS listener with a certificate of a CA made for this broker

    @property
    def ca_file(self) -> Path:
        return self.folder / "ca.crt"

    def _tls_lines(self) -> str:
        if not self.tls:
            return ""
        if not self.ca_file.exists():
            make_test_certificates(self.folder)
        return (f"cafile {self.ca_file}\ncertfile {self.folder / 'server.crt'}\n"
                f"keyfile {self.folder / 'server.key'}\n")

    @property
    def url(self) -> str:
        return f"{'mqtts' if self.tls else 'mqtt'}://127.0.0.1:{self.port}"

    def _auth_lines(self) -> str:
        if not self.users:
            return "allow_anonymous true\n"
        pw = self.folder / "passwords"
        pw.unlink(missing_ok=True)
        for user, password in self.users.items():
            flags = ["-b"] if pw.exists() else ["-c", "-b"]
            subprocess.run([MOSQUITTO_PASSWD, *flags, str(pw), user, password], check=True,
                           stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        return f"allow_anonymous false\npassword_file {pw}\n"

    def start(self) -> None:
        self.folder.mkdir(parents=True, exist_ok=True)
        conf = self.folder / "mosquitto.conf"
        conf.write_text(
            f"listener {self.port} 127.0.0.1\n"
            # as root mosquitto would switch to user "mosquitto", which cannot write
            # the persistence file into the test's private folder: stay who we are
            f"user {getpass.getuser()}\n"
            + self._auth_lines() + self._tls_lines() +
            "persistence true\n"
            f"persistence_location {self.folder}/\n"
            "max_queued_messages 100000\n"
            "max_inflight_messages 100\n"
            "set_tcp_nodelay true\n"
            f"log_dest file {self.folder}/mosquitto.log\n"
        )
        self.proc = subprocess.Popen([MOSQUITTO, "-c", str(conf)],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        wait_listening(self.port, self.proc)

    def stop(self) -> None:
        """SIGTERM (mosquitto saves its persistence file) and wait for the exit."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.proc = None


def make_test_certificates(folder: Path) -> None:
    """A throw-away CA (ca.crt) and a server certificate for 127.0.0.1, with openssl."""
    def run(*args: str) -> None:
        subprocess.run(["openssl", *args], cwd=folder, check=True,
                       stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)

    key = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]
    run("req", "-x509", *key, "-keyout", "ca.key", "-out", "ca.crt", "-days", "2",
        "-subj", "/CN=livematch test CA")
    run("req", *key, "-keyout", "server.key", "-out", "server.csr", "-subj", "/CN=127.0.0.1")
    (folder / "ext.cnf").write_text("subjectAltName=IP:127.0.0.1\nbasicConstraints=CA:FALSE\n")
    run("x509", "-req", "-in", "server.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
        "-CAcreateserial", "-out", "server.crt", "-days", "2", "-extfile", "ext.cnf")


@dataclass
class RedisServer:
    """A redis-server without persistence on a free port."""

    folder: Path
    port: int = field(default_factory=free_port)
    proc: subprocess.Popen[bytes] | None = None
    password: str = ""  # non-empty: started with requirepass (AUTH needed)
    tls: bool = False  # TLS only (rediss://), with a throw-away CA in folder/ca.crt

    @property
    def url(self) -> str:
        return f"{'rediss' if self.tls else 'redis'}://127.0.0.1:{self.port}/0"

    @property
    def ca_file(self) -> Path:
        return self.folder / "ca.crt"

    def _tls_args(self) -> list[str]:
        if not self.tls:
            return ["--port", str(self.port)]
        if not self.ca_file.exists():
            make_test_certificates(self.folder)
        return ["--port", "0", "--tls-port", str(self.port),
                "--tls-cert-file", str(self.folder / "server.crt"),
                "--tls-key-file", str(self.folder / "server.key"),
                "--tls-ca-cert-file", str(self.ca_file), "--tls-auth-clients", "no"]

    def start(self) -> None:
        self.folder.mkdir(parents=True, exist_ok=True)
        self.proc = subprocess.Popen(
            [REDIS_SERVER, *self._tls_args(), "--bind", "127.0.0.1",
             "--save", "", "--appendonly", "no", "--dir", str(self.folder),
             "--protected-mode", "no",
             *(["--requirepass", self.password] if self.password else [])],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        wait_listening(self.port, self.proc)

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.proc = None


# -- MQTT helpers for tests --------------------------------------------------------------


NODELAY = [(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)]


def _session_props(expiry: int) -> Properties:
    props = Properties(PacketTypes.CONNECT)
    props.SessionExpiryInterval = expiry
    return props


@dataclass
class Collector:
    """Subscribes (QoS 1, persistent session) and keeps every message it receives.

    It reconnects by itself when the broker goes away, so with a persistent session it
    also gets what was published while it was disconnected.
    """

    host: str
    port: int
    topic_filter: str
    client_id: str = field(default_factory=lambda: f"collector-{uuid.uuid4().hex[:8]}")
    tls_context: ssl.SSLContext | None = None
    messages: list[tuple[str, bytes, bool]] = field(default_factory=list)
    subscribed: asyncio.Event = field(default_factory=asyncio.Event)
    _task: asyncio.Task[None] | None = None

    async def _run(self) -> None:
        while True:
            try:
                async with aiomqtt.Client(
                    self.host, self.port, identifier=self.client_id,
                    protocol=aiomqtt.ProtocolVersion.V5, clean_start=False,
                    properties=_session_props(600), tls_context=self.tls_context,
                    socket_options=NODELAY,
                ) as client:
                    await client.subscribe(self.topic_filter, qos=1)
                    self.subscribed.set()
                    async for m in client.messages:
                        payload = m.payload if isinstance(m.payload, bytes) else b""
                        self.messages.append((m.topic.value, payload, bool(m.retain)))
            except aiomqtt.MqttError:
                # aiomqtt's __aexit__ can turn a cancellation into an MqttError (its
                # disconnect timed out): do not mistake being stopped for a broker outage
                task = asyncio.current_task()
                if task is not None and task.cancelling():
                    raise asyncio.CancelledError from None
                await asyncio.sleep(0.2)

    async def __aenter__(self) -> Collector:
        self._task = asyncio.create_task(self._run(), name="collector")
        await asyncio.wait_for(self.subscribed.wait(), timeout=WAIT_S)
        return self

    async def __aexit__(self, *exc: object) -> None:
        assert self._task is not None
        self._task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await self._task

    def records(self, topic_part: str) -> list[dict[str, Any]]:
        """Decoded payloads of the messages whose topic contains ``topic_part``."""
        return [json.loads(p) for t, p, _ in self.messages if topic_part in t]

    def windows(self, topic_part: str) -> list[set[int]]:
        """The ``window_fixes`` of the assignments on ``topic_part``, one set per fix time
        in time order: ``[{1}, {2}, ...]`` when every fix was answered once, or by two
        workers that agreed, and each window grew by one fix."""
        seen: dict[float, set[int]] = {}
        for r in self.records(topic_part):
            seen.setdefault(r["time"], set()).add(r["window_fixes"])
        return [seen[t] for t in sorted(seen)]

    async def wait_for(self, topic_part: str, count: int, timeout: float = WAIT_S) -> None:
        """Wait until at least ``count`` messages with ``topic_part`` arrived."""
        deadline = time.monotonic() + timeout
        while len(self.records(topic_part)) < count:
            if time.monotonic() > deadline:
                raise AssertionError(f"only {len(self.records(topic_part))} of {count} "
                                     f"messages on *{topic_part}* after {timeout} s")
            await asyncio.sleep(0.05)


async def wait_until(cond: Callable[[], object], what: str, timeout: float = WAIT_S,
                     poll_s: float = 0.05) -> None:
    """Wait until ``cond()`` is true (awaiting it when it returns an awaitable).

    Raises AssertionError naming ``what`` after ``timeout`` seconds. Use it instead of a
    fixed sleep before an assertion: the test then waits for the event itself (a
    readiness change, a log line, a counter), as long as a loaded machine needs and no
    longer.
    """
    deadline = time.monotonic() + timeout
    while True:
        got = cond()
        if inspect.isawaitable(got):
            got = await got
        if got:
            return
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout:g} s waiting for {what}")
        await asyncio.sleep(poll_s)


def logged(records: Sequence[logging.LogRecord], message: str) -> int:
    """How many of ``records`` have exactly ``message`` (a log line's text before its
    ``key=value`` fields)."""
    return sum(1 for r in records if r.getMessage() == message)


@contextlib.asynccontextmanager
async def publisher(port: int, tls_context: ssl.SSLContext | None = None
                    ) -> AsyncIterator[aiomqtt.Client]:
    """A connected client for publishing test input."""
    async with aiomqtt.Client("127.0.0.1", port, identifier=f"pub-{uuid.uuid4().hex[:8]}",
                              tls_context=tls_context, socket_options=NODELAY) as client:
        yield client


def subprocess_env() -> dict[str, str]:
    """Environment for ``python -m livematch.cli`` subprocesses (no stray overrides)."""
    return {k: v for k, v in os.environ.items() if not k.startswith("LIVEMATCH")}


# -- a small town and its traffic ------------------------------------------------------

#: All test networks are about this point (Helsinki centre), in local metres.
PROJECTION = Projection.local(24.94, 60.17)
#: Fix times start here: 2026-05-28 (inside the feed's accepted years).
T0 = 1_780_000_000.0


def town() -> RoadNetwork:
    """Main Street (way 1, y=0, 0..5000 m) crossed by Side Street (way 2, x=1000)."""
    main = Road([(float(x), 0.0) for x in range(0, 5001, 100)], way=1, name="Main Street")
    side = Road([(1000.0, float(y)) for y in range(-1000, 1001, 100)], way=2,
                name="Side Street")
    return network_from_roads([main, side], PROJECTION)


def position(vehicle: str | None, t: float, x: float, y: float, **extra: Any) -> bytes:
    """A position message (JSON bytes) at projected (x, y) metres."""
    lon, lat = PROJECTION.to_lonlat(x, y)
    msg: dict[str, Any] = {"time": t, "lat": round(float(lat), 7), "lon": round(float(lon), 7)}
    if vehicle is not None:
        msg["vehicle"] = vehicle
    msg.update(extra)
    return json.dumps(msg).encode()


def drive(vehicle: str, n: int, *, start_x: float = 100.0, first: int = 0,
          step_m: float = 12.0, dt: float = 1.0) -> list[tuple[float, bytes]]:
    """Fixes ``first..first+n-1`` of a vehicle driving east on Main Street (±2 m jitter)."""
    out = []
    for i in range(first, first + n):
        t = T0 + i * dt
        out.append((t, position(vehicle, t, start_x + i * step_m, 2.0 if i % 2 else -2.0)))
    return out


def write_config(folder: Path, prefix: str, *, broker: str, store: str = "memory://",
                 network: str = "", metrics: str = "127.0.0.1:0", extra: str = "",
                 topic: str = "fleet/+/position") -> Path:
    """A daemon config file whose topics and keys all live under ``prefix``."""
    path = folder / f"{prefix}.toml"
    path.write_text(f"""
[inputs]
network = "{network}"

[mqtt]
url = "{broker}"
topic = "{prefix}/{topic}"
client_id = "livematch-{prefix}"
match_topic = "{prefix}/out/match/{{vehicle}}"
commit_topic = "{prefix}/out/commit/{{vehicle}}"
alert_topic = "{prefix}/out/alert/{{vehicle}}"
reject_topic = "{prefix}/out/rejects"
max_payload_bytes = 1024
reconnect_min_s = 0.1
reconnect_max_s = 0.5

[store]
url = "{store}"
key_prefix = "{prefix}:"
checkpoint_every_fixes = 5
checkpoint_every_s = 1.0

[metrics]
listen = "{metrics}"

[log]
level = "info"
{extra}
""")
    return path


async def http_get(port: int, path: str) -> tuple[int, str]:
    """GET http://127.0.0.1:port/path: (status, body); at most 10 s."""
    async with asyncio.timeout(10):
        reader, writer = await asyncio.open_connection("127.0.0.1", port)
        writer.write(f"GET {path} HTTP/1.1\r\nHost: x\r\n\r\n".encode())
        await writer.drain()
        raw = await reader.read()
        writer.close()
    head, _, body = raw.partition(b"\r\n\r\n")
    return int(head.split()[1]), body.decode()


async def end_group_run(watcher: asyncio.Task[Any], procs: dict[str, subprocess.Popen[bytes]],
                        client: Any) -> None:
    """Tear down a worker-group test: the checkpoint watcher, the workers, its Redis client.

    The watcher is let end before its client closes (bounded: a Redis read may ignore
    the cancel); workers still running are killed.
    """
    watcher.cancel()
    await asyncio.wait({watcher}, timeout=5)
    if watcher.done() and not watcher.cancelled():
        watcher.exception()  # retrieved: a closed connection is expected here
    for proc in procs.values():
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    await client.aclose()
