"""Fixtures: real mosquitto and redis-server on free loopback ports, a prefix per test.

Load them in a test module with ``pytest_plugins = ("fixtures_services",)``.
"""

from __future__ import annotations

import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from services import Mosquitto, RedisServer


@pytest.fixture(scope="session")
def mosquitto(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Mosquitto]:
    """One broker shared by the tests of a session (tests use their own topic prefix)."""
    broker = Mosquitto(tmp_path_factory.mktemp("mosquitto"))
    broker.start()
    yield broker
    broker.stop()


@pytest.fixture
def own_mosquitto(tmp_path: Path) -> Iterator[Mosquitto]:
    """A broker for one test only (to stop and restart it)."""
    broker = Mosquitto(tmp_path / "mosquitto")
    broker.start()
    yield broker
    broker.stop()


@pytest.fixture(scope="session")
def redis_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[RedisServer]:
    """One redis-server shared by the tests of a session (tests use their own prefix)."""
    server = RedisServer(tmp_path_factory.mktemp("redis"))
    server.start()
    yield server
    server.stop()


@pytest.fixture
def prefix() -> str:
    """A topic and key prefix unique to this test."""
    return f"t{uuid.uuid4().hex[:10]}"


@pytest.fixture
def own_redis(tmp_path: Path) -> Iterator[RedisServer]:
    """A redis-server for one test only (to stop and restart it)."""
    server = RedisServer(tmp_path / "redis")
    server.start()
    yield server
    server.stop()
