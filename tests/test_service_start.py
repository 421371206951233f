"""``livematch run`` start-up: health port open while the kernels load; ``livematch warm``."""

from __future__ import annotations

import asyncio
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from services import (
    WAIT_S,
    Mosquitto,
    free_port,
    http_get,
    subprocess_env,
    town,
    write_config,
)

import livematch
from livematch import native
from livematch.mapdata.netfile import save_network

pytest_plugins = ("fixtures_services",)

ROOT = Path(__file__).resolve().parent.parent
LARKMOOR = ROOT / "replay_logs"


def start(config: Path, log_path: Path) -> subprocess.Popen[bytes]:
    with log_path.open("ab") as log:
        return subprocess.Popen([sys.executable, "-m", "livematch.cli", "run",
                                 "--config", str(config)],
                                stdout=log, stderr=log, env=subprocess_env())


def start_on_town(mosquitto: Mosquitto, prefix: str,
                  tmp_path: Path) -> tuple[subprocess.Popen[bytes], int]:
    """``livematch run`` on the invented town's compiled map: (process, metrics port)."""
    net = tmp_path / "town.lmnet"
    save_network(town(), net)
    port = free_port()
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url, network=str(net),
                       metrics=f"127.0.0.1:{port}")
    return start(cfg, tmp_path / "daemon.log"), port


async def probe(port: int, path: str) -> tuple[int, str] | None:
    """(status, body) of one GET, None while nothing listens."""
    try:
        return await http_get(port, path)
    except OSError:
        return None


async def test_run_answers_healthz_while_compiling_then_ready(
        mosquitto: Mosquitto, prefix: str, tmp_path: Path) -> None:
    """/healthz is 200 while /readyz still says "not ready: compiling"; /readyz turns 200."""
    proc, port = start_on_town(mosquitto, prefix, tmp_path)
    seen: list[tuple[int, str, int, str]] = []  # healthz and readyz, polled together
    try:
        deadline = time.monotonic() + 600  # a cold numba cache: a compile of 75-120 s
        while time.monotonic() < deadline:
            assert proc.poll() is None, f"daemon exited with {proc.returncode}"
            ready = await probe(port, "/readyz")
            health = await probe(port, "/healthz")
            if ready is not None and health is not None:
                seen.append((*health, *ready))
                if ready[0] == 200:
                    break
            await asyncio.sleep(0.005)
        assert seen and seen[-1][2:] == (200, "ready\n"), seen[-3:]
        metrics = await probe(port, "/metrics")
    finally:
        proc.send_signal(signal.SIGTERM)
        assert await asyncio.to_thread(proc.wait, 30) == 0
    # Every answer of /healthz once the port was open was 200, including while the
    # kernels were being loaded (here from numba's cache, so for about a second).
    assert {h for h, _, _, _ in seen} == {200}
    bodies = [body for _, _, status, body in seen if status == 503]
    assert bodies[0] == "not ready: compiling\n"
    # then the network, then what the daemon waits for (broker, store, restore) or ready
    stages = list(dict.fromkeys(b.split(":", 1)[1].strip().split(",")[0] for b in bodies))
    assert stages[0] == "compiling"
    assert set(stages) <= {"compiling", "network", "broker", "store", "restore"}
    log = (tmp_path / "daemon.log").read_text()
    assert log.index('event="http listening"') < log.index('event="kernels ready"')
    assert log.index('event="kernels ready"') < log.index('event="network loaded"')
    # How the worker runs, for operators: the same as this test process decides (the
    # kernels ahead of time after scripts/test; the check of every call is not a label).
    assert f'kernels="{native.kernels_why()}"' in log
    assert metrics is not None and metrics[0] == 200
    info = next(line for line in metrics[1].splitlines()
                if line.startswith("livematch_build_info{"))
    assert f'kernels_why="{native.kernels_why()}"' in info and info.endswith(" 1.0"), info
    assert f'version="{livematch.__version__}"' in info and 'stale=""' in info, info


async def test_run_stopped_while_starting_exits_cleanly(
        mosquitto: Mosquitto, prefix: str, tmp_path: Path) -> None:
    """SIGTERM before the daemon is ready ends the process with exit code 0."""
    proc, port = start_on_town(mosquitto, prefix, tmp_path)
    try:
        deadline = time.monotonic() + 60
        while (await probe(port, "/healthz")) is None:
            assert time.monotonic() < deadline and proc.poll() is None
            await asyncio.sleep(0.005)
    finally:
        proc.send_signal(signal.SIGTERM)
        code = await asyncio.to_thread(proc.wait, 30)
    assert code == 0
    log = (tmp_path / "daemon.log").read_text()
    assert ('event="stopped while starting"' in log) or ('event="stopped"' in log)


def test_run_without_network_fails_with_one_line(tmp_path: Path) -> None:
    """No network configured: exit code 2 and one error line, as before the early port."""
    port = free_port()
    cfg = write_config(tmp_path, "nonet", broker="mqtt://127.0.0.1:1",
                       metrics=f"127.0.0.1:{port}")
    done = subprocess.run([sys.executable, "-m", "livematch.cli", "run", "--config", str(cfg)],
                          capture_output=True, text=True, env=subprocess_env(), timeout=WAIT_S)
    assert done.returncode == 2
    errors = [line for line in done.stderr.splitlines() if line.startswith("livematch: error:")]
    assert len(errors) == 1 and "no road network" in errors[0]
    assert "Traceback" not in done.stderr


def warm(*args: str, kernels: str = "jit") -> subprocess.CompletedProcess[str]:
    """``livematch warm``; ``kernels``: ``LIVEMATCH_KERNELS`` (numba's JIT by default: the
    cache these tests are about)."""
    env = {**subprocess_env(), "LIVEMATCH_KERNELS": kernels}
    return subprocess.run([sys.executable, "-m", "livematch.cli", "warm", *args],
                          capture_output=True, text=True, env=env, timeout=600)


def test_warm_with_kernels_compiled_ahead_of_time(tmp_path: Path) -> None:
    """A compiled install's kernels need no warming; the network is still checked."""
    from livematch.core import _jit

    if _jit.mode() != "aot":
        pytest.skip("kernels under numba's JIT in this process (from source)")
    net = tmp_path / "town.lmnet"
    save_network(town(), net)
    done = warm("--network", str(net), kernels="")
    assert done.returncode == 0, done.stderr
    first, second = done.stdout.splitlines()[:2]
    assert "compiled ahead of time by the install, nothing to compile" in first
    assert second.startswith(f"network {net}: read, pipeline built")


def test_warm_fills_the_cache_so_a_second_run_compiles_nothing(tmp_path: Path) -> None:
    """After ``livematch warm`` another process loads every kernel and compiles none."""
    net = tmp_path / "town.lmnet"
    save_network(town(), net)
    first = warm("--network", str(net))  # compiles whatever the cache lacks
    assert first.returncode == 0, first.stderr
    second = warm()
    assert second.returncode == 0, second.stderr
    line = second.stdout.splitlines()[0]
    assert " 0 compiled, " in line, line
    loaded = int(line.split(" 0 compiled, ")[1].split()[0])
    assert loaded >= 20  # the sweep, tree, routing, route-window and fence kernels
    assert first.stdout.splitlines()[1].startswith(f"network {net}: read, pipeline built")


def test_warm_bad_network_fails_with_one_line(tmp_path: Path) -> None:
    """A map that cannot be read ends ``warm`` with exit code 2 and one error line."""
    bad = tmp_path / "bad.geojson"
    bad.write_text("{not json")
    done = warm("--network", str(bad))
    assert done.returncode == 2
    assert done.stderr.startswith("livematch: error:") and len(done.stderr.splitlines()) == 1
    assert str(bad) in done.stderr


def test_warm_covers_every_kernel_the_pipeline_uses() -> None:
    """After prepare_kernels, replaying a feed with routes and fences loads no further kernel."""
    script = f"""
import contextlib, io, tempfile
from livematch.pipeline import prepare_kernels
from livematch.commands.warm import kernel_counts
from livematch.cli import main
prepare_kernels()
before = kernel_counts()
with tempfile.TemporaryDirectory() as out, contextlib.redirect_stderr(io.StringIO()):
    assert main(["replay", "{LARKMOOR / 'larkmoor-morning.jsonl.gz'}",
                 "--network", "{LARKMOOR / 'larkmoor.geojson'}",
                 "--routes", "{LARKMOOR / 'larkmoor-routes.geojson'}",
                 "--fences", "{LARKMOOR / 'larkmoor-fences.geojson'}", "--out", out]) == 0
print(*before)
print(*kernel_counts())
"""
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                          env={**subprocess_env(), "LIVEMATCH_KERNELS": "jit"}, timeout=600,
                          cwd=ROOT)
    assert done.returncode == 0, done.stderr
    before, after = done.stdout.splitlines()[-2:]
    assert int(before.split()[1]) >= 20  # kernels loaded (or compiled) by prepare_kernels
    assert after == before  # the replay compiled and loaded nothing more
