"""Redis AUTH for the daemon (password from the environment or a file, never logged)."""

from __future__ import annotations

import asyncio
import logging
from pathlib import Path

import pytest
import redis
from services import (
    Mosquitto,
    RedisServer,
    drive,
    logged,
    publisher,
    town,
    wait_until,
    write_config,
)
from test_service_daemon import running

from livematch.config import load_config
from livematch.errors import BadConfigError
from livematch.pipeline import Pipeline
from livematch.service.daemon import Daemon
from livematch.service.logs import KeyValueFormatter
from livematch.service.store import RedisStore

pytest_plugins = ("fixtures_services",)

SECRET = "redis-secret-7f3a"


@pytest.fixture
def auth_redis(tmp_path: Path):
    """A redis-server that needs AUTH (requirepass)."""
    server = RedisServer(tmp_path / "redis-auth", password=SECRET)
    server.start()
    yield server
    server.stop()


def log_text(caplog: pytest.LogCaptureFixture) -> str:
    return "\n".join(KeyValueFormatter().format(r) for r in caplog.records)


async def test_daemon_redis_password_from_env_never_logged(
        mosquitto: Mosquitto, auth_redis: RedisServer, prefix: str, tmp_path: Path,
        caplog: pytest.LogCaptureFixture) -> None:
    """With LIVEMATCH_REDIS_PASSWORD the daemon is ready and checkpoints into a Redis
    with requirepass; a wrong password leaves it not ready; no log line holds either."""
    caplog.set_level(logging.DEBUG)
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url, store=auth_redis.url)
    config = load_config(cfg, env={"LIVEMATCH_REDIS_PASSWORD": SECRET})
    assert SECRET not in repr(config)
    daemon = Daemon(config, Pipeline(town(), config.matcher, limits=config.feed))
    async with running(daemon), publisher(mosquitto.port) as pub:
        for _, payload in drive("sec-1", 6):
            await pub.publish(f"{prefix}/fleet/sec-1/position", payload, qos=1)
        await wait_until(lambda: daemon.pipeline.counters["fixes"] == 6, "6 fixes matched")
    raw = redis.Redis.from_url(auth_redis.url, password=SECRET)
    assert raw.exists(f"{prefix}:vehicle:sec-1") == 1
    with pytest.raises(redis.AuthenticationError):
        redis.Redis.from_url(auth_redis.url).ping()  # the server really needs AUTH
    wrong = load_config(cfg, env={"LIVEMATCH_REDIS_PASSWORD": "wrong-redis-pass-9"})
    daemon = Daemon(wrong, Pipeline(daemon.pipeline.network, wrong.matcher))
    seen = len(caplog.records)
    task = asyncio.create_task(daemon.run())
    # refused, and refused again on the retry: not a slow first attempt
    await wait_until(lambda: task.done() or logged(
        caplog.records[seen:], "store unavailable") >= 2, "two refused store connections")
    assert not task.done(), task.exception()
    assert "store" in daemon.readiness()
    daemon.request_stop()
    await asyncio.wait_for(task, timeout=30)
    lines = log_text(caplog)
    assert "store unavailable" in lines
    assert SECRET not in lines and "wrong-redis-pass-9" not in lines


async def test_redis_store_password_file_and_url_redacted(
        auth_redis: RedisServer, tmp_path: Path) -> None:
    """store.password_file gives the password (the environment wins); a password in the
    URL is used but shown as *** in errors."""
    secret_file = tmp_path / "redis.pw"
    secret_file.write_text(SECRET + "\n")
    cfg = tmp_path / "c.toml"
    cfg.write_text(f'[store]\nurl = "{auth_redis.url}"\npassword_file = "redis.pw"\n')
    assert load_config(cfg, env={}).store_password == SECRET
    assert load_config(cfg, env={"LIVEMATCH_REDIS_PASSWORD": "x"}).store_password == "x"
    secret_file.unlink()
    with pytest.raises(BadConfigError, match=r"store\.password_file cannot be read"):
        load_config(cfg, env={})
    store = RedisStore(auth_redis.url, key_prefix="sec:", password=SECRET)
    await store.connect()
    await store.close()
    bad_url = f"redis://:wrong-in-url-5@127.0.0.1:{auth_redis.port}/0"
    store = RedisStore(bad_url, key_prefix="sec:")
    with pytest.raises(Exception) as info:
        await store.connect()
    await store.close()
    assert "wrong-in-url-5" not in str(info.value) and "***" in str(info.value)


async def test_redis_store_tls_with_own_ca(tmp_path: Path) -> None:
    """rediss:// with store.ca_file and a password connects; without the CA it is refused."""
    server = RedisServer(tmp_path / "redis-tls", password=SECRET, tls=True)
    server.start()
    try:
        assert server.url.startswith("rediss://")
        store = RedisStore(server.url, key_prefix="tls:", password=SECRET,
                           ca_file=str(server.ca_file))
        await store.connect()
        await store.save({"v1": b"blob"}, ttl_s=60)
        assert (await store.load_all()) == {"v1": b"blob"}
        await store.close()
        untrusted = RedisStore(server.url, key_prefix="tls:", password=SECRET)
        with pytest.raises(Exception, match="certificate"):
            await untrusted.connect()
        await untrusted.close()
    finally:
        server.stop()
