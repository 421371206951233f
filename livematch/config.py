"""The daemon's configuration: a TOML file, environment overrides and command-line flags.

Precedence, lowest first: built-in defaults, the TOML file, environment variables
``LIVEMATCH__<SECTION>__<KEY>`` (any key; the value is parsed as a TOML value, and taken
as a plain string when it is not one, so ``LIVEMATCH__MQTT__URL=mqtt://broker:1883``
needs no quotes), then the ``livematch run`` flags for the common settings.

Everything is validated at start: an unknown section or key, a wrong type or an
out-of-range value raises :class:`~livematch.errors.BadConfigError` naming where the
value came from, the key and what was expected, e.g.::

    config/live.toml: matcher.eps_levels must be strictly increasing, got [30.0, 15.0]

MQTT credentials never live in the file or the URL: they come from
``LIVEMATCH_MQTT_USERNAME`` / ``LIVEMATCH_MQTT_PASSWORD`` or from ``mqtt.username`` plus
``mqtt.password_file`` (a file holding only the password), and they are never logged.

Example:
    >>> cfg = load_config(None, env={"LIVEMATCH__MATCHER__EPS_LEVELS": "[10, 20]"})
    >>> cfg.matcher.eps_levels, cfg.mqtt.topic
    ((10.0, 20.0), 'fleet/+/position')
    >>> load_config(None, env={})  == load_config(None, env={})  # degenerate: all defaults
    True
"""

from __future__ import annotations

import math
import os
import re
import tomllib
import typing
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from livematch.core.monitors import AlertSettings
from livematch.core.settings import MatchSettings
from livematch.errors import BadConfigError
from livematch.feed.decode import FeedLimits
from livematch.lab.record import RecordSettings
from livematch.pipeline import (
    CONTROL_TOPIC,
    alert_settings_from_mapping,
    matcher_settings_from_mapping,
)

ENV_PREFIX = "LIVEMATCH__"
USERNAME_ENV = "LIVEMATCH_MQTT_USERNAME"
PASSWORD_ENV = "LIVEMATCH_MQTT_PASSWORD"
REDIS_PASSWORD_ENV = "LIVEMATCH_REDIS_PASSWORD"

# Characters allowed in a Redis key prefix: none of them is special in a SCAN MATCH
# pattern, so "all vehicles under the prefix" is an exact query.
_PREFIX_RE = re.compile(r"^[A-Za-z0-9:_.{}\-]*$")
_GROUP_NAME_RE = re.compile(r"^[A-Za-z0-9._\-]{0,64}$")
# Longest mqtt.gather_s: every matched fix may wait this long on top of its matching.
_GATHER_MAX_S = 0.1
_LEVELS = ("debug", "info", "warning", "error")
# Keys holding file paths: relative ones in a file are relative to that file's folder.
_PATH_KEYS = {("inputs", "network"), ("inputs", "routes"), ("inputs", "fences"),
              ("mqtt", "password_file"), ("mqtt", "ca_file"), ("record", "path"),
              ("store", "password_file"), ("store", "ca_file")}


@dataclass(frozen=True, kw_only=True)
class InputsConfig:
    """``[inputs]``: the map and the optional route and geofence files.

    Relative paths in a file are taken relative to that file's folder.
    """

    network: str = ""
    routes: str = ""
    fences: str = ""

    def problems(self) -> list[tuple[str, str]]:
        """Nothing to range-check: paths are opened (and reported) at start."""
        return []


@dataclass(frozen=True, kw_only=True)
class MqttConfig:
    """``[mqtt]``: broker, topics and session. Times in seconds, sizes in bytes.

    ``topic`` is the subscription filter; the vehicle id comes from the payload or from
    the filter's ``+`` level. A ``{shard}`` level (``fleet/{shard}/+/position``) carries
    the vehicle's shard (:func:`livematch.service.shards.shard_of` with
    ``group.shards``): a worker of a group then subscribes only to its shards' topics
    and those it stands by for, a standalone daemon to all (``{shard}`` read as ``+``).
    ``control_topic`` carries route assignments (retained, ``{"route": "550"}``; its
    ``+`` level is the vehicle; ``""`` subscribes to none).
    Output topics are templates with ``{vehicle}``. A persistent MQTT v5 session
    (``session_expiry_s`` > 0) keeps QoS 1 fixes published while the daemon restarts.
    ``intake_max`` bounds the messages received and waiting to be matched; beyond it the
    oldest waiting message of a vehicle with a newer one waiting is shed
    (:class:`livematch.service.mqtt.IntakeQueue`).
    ``gather_s`` (0 = off): once a message wakes a worker that was waiting for one, it
    leaves the broker's socket unwatched for this long before reading what has come,
    then matches all of it back to back, and while fixes keep coming reads again every
    ``gather_s`` (one timer wake-up each) instead of as each arrives: fewer wake-ups and
    warmer caches per fix, at up to ``gather_s`` more latency (``docs/measured.md``
    "Session 28 (two28)").
    """

    url: str = "mqtt://127.0.0.1:1883"
    topic: str = "fleet/+/position"
    client_id: str = "livematch"
    session_expiry_s: int = 3600
    qos: int = 1
    keepalive_s: int = 30
    control_topic: str = CONTROL_TOPIC
    match_topic: str = "livematch/match/{vehicle}"
    commit_topic: str = "livematch/commit/{vehicle}"
    alert_topic: str = "livematch/alert/{vehicle}"
    reject_topic: str = "livematch/rejects"
    max_payload_bytes: int = 4096
    username: str = ""
    password_file: str = ""
    ca_file: str = ""
    reconnect_min_s: float = 0.5
    reconnect_max_s: float = 30.0
    intake_max: int = 10_000
    gather_s: float = 0.0

    def problems(self) -> list[tuple[str, str]]:
        """Every invalid value as (key, expectation with the value found)."""
        out: list[tuple[str, str]] = []
        if self.intake_max < 1:
            out.append(("intake_max", f"must be >= 1, got {self.intake_max}"))
        if not (math.isfinite(self.gather_s) and 0.0 <= self.gather_s <= _GATHER_MAX_S):
            out.append(("gather_s", f"must be 0..{_GATHER_MAX_S:g} seconds (0: off), "
                                    f"got {self.gather_s}"))
        parts = urlsplit(self.url)
        if parts.scheme not in ("mqtt", "mqtts") or not parts.hostname:
            out.append(("url", f"must be mqtt://HOST[:PORT] or mqtts://HOST[:PORT], "
                               f"got {self.url!r}"))
        elif parts.username is not None or parts.password is not None:
            out.append(("url", f"must not carry credentials (use {USERNAME_ENV} / "
                               f"{PASSWORD_ENV} or mqtt.password_file), got {_redact(self.url)}"))
        else:
            try:
                parts.port  # noqa: B018 - raises ValueError on a bad port
            except ValueError:
                out.append(("url", f"has a bad port, got {self.url!r}"))
        levels = self.topic.split("/")
        plain = self.topic.replace("{shard}", "+")  # what is subscribed to without a group
        if "{shard}" in self.topic and (self.topic.count("{shard}") != 1
                                        or levels.count("{shard}") != 1):
            out.append(("topic", f"may hold {{shard}} once, as a whole level "
                                 f"(fleet/{{shard}}/+/position), got {self.topic!r}"))
        elif not _valid_filter(plain) or levels.count("+") > 1:
            out.append(("topic", f"must be an MQTT topic filter with at most one '+' level "
                                 f"(the vehicle id), got {self.topic!r}"))
        else:
            clash = [key for key in ("match_topic", "commit_topic", "alert_topic",
                                     "reject_topic")
                     if _filter_matches(plain, getattr(self, key).replace("{vehicle}", "v"))]
            if clash:
                out.append(("topic", f"must not match the output topics "
                                     f"{', '.join('mqtt.' + k for k in clash)} (the daemon "
                                     f"would read its own output), got {self.topic!r}"))
        if self.control_topic and (not _valid_filter(self.control_topic)
                                   or self.control_topic.split("/").count("+") != 1):
            out.append(("control_topic", f"must be an MQTT topic filter with one '+' level "
                                         f"(the vehicle id), or \"\" for none, "
                                         f"got {self.control_topic!r}"))
        elif self.control_topic:
            clash = [key for key in ("match_topic", "commit_topic", "alert_topic",
                                     "reject_topic")
                     if _filter_matches(self.control_topic,
                                        getattr(self, key).replace("{vehicle}", "v"))]
            if clash:
                out.append(("control_topic", f"must not match the output topics "
                                             f"{', '.join('mqtt.' + k for k in clash)}, "
                                             f"got {self.control_topic!r}"))
        if not (0 < len(self.client_id) <= 128):
            out.append(("client_id", f"must be 1..128 characters, got {self.client_id!r}"))
        for key in ("match_topic", "commit_topic", "alert_topic"):
            value = getattr(self, key)
            if "{vehicle}" not in value or not _valid_name(value.replace("{vehicle}", "v")):
                out.append((key, f"must be a topic name containing {{vehicle}} and no "
                                 f"wildcard, got {value!r}"))
        if not _valid_name(self.reject_topic):
            out.append(("reject_topic", f"must be a topic name without wildcards, "
                                        f"got {self.reject_topic!r}"))
        if self.qos not in (0, 1, 2):
            out.append(("qos", f"must be 0, 1 or 2, got {self.qos!r}"))
        if not 0 <= self.session_expiry_s <= 0xFFFFFFFF:
            out.append(("session_expiry_s", f"must be 0..4294967295 seconds, "
                                            f"got {self.session_expiry_s}"))
        if not 5 <= self.keepalive_s <= 65535:
            out.append(("keepalive_s", f"must be 5..65535 seconds, got {self.keepalive_s}"))
        if not 64 <= self.max_payload_bytes <= 268_435_455:
            out.append(("max_payload_bytes", f"must be 64..268435455 bytes, "
                                             f"got {self.max_payload_bytes}"))
        if not (math.isfinite(self.reconnect_min_s) and self.reconnect_min_s > 0):
            out.append(("reconnect_min_s", f"must be a positive number of seconds, "
                                           f"got {self.reconnect_min_s}"))
        elif not (math.isfinite(self.reconnect_max_s)
                  and self.reconnect_max_s >= self.reconnect_min_s):
            out.append(("reconnect_max_s", f"must be >= reconnect_min_s "
                                           f"({self.reconnect_min_s}), got {self.reconnect_max_s}"))
        return out


@dataclass(frozen=True, kw_only=True)
class StoreConfig:
    """``[store]``: where per-vehicle checkpoints live. Times in seconds.

    ``url`` is ``memory://`` (default; state is lost on exit) or ``redis://HOST:PORT/DB``
    (``rediss://`` for TLS). A vehicle is checkpointed after ``checkpoint_every_fixes``
    fixes or ``checkpoint_every_s`` seconds, whichever comes first, and on shutdown; one
    idle for ``idle_ttl_s`` (fix time, and wall-clock key expiry in Redis) is dropped.
    ``park_after_s`` > 0 keeps a vehicle from which nothing arrived for longer than that
    (receive time) as its checkpoint bytes in memory until its next fix (``0``, the
    default: every vehicle stays live; see :meth:`livematch.pipeline.Pipeline.park_idle`).
    Redis AUTH: the password comes from ``LIVEMATCH_REDIS_PASSWORD``, else from
    ``password_file`` (the file holds only the password), else from the URL (allowed,
    but it is then in the config; logs show it as ``***``); ``username`` names a Redis
    ACL user (default: the ``default`` user). ``rediss://`` uses TLS with the system's
    trust store, or ``ca_file`` when set.
    """

    url: str = "memory://"
    key_prefix: str = "livematch:"
    checkpoint_every_fixes: int = 20
    checkpoint_every_s: float = 10.0
    idle_ttl_s: float = 3600.0
    park_after_s: float = 0.0
    username: str = ""
    password_file: str = ""
    ca_file: str = ""

    def problems(self) -> list[tuple[str, str]]:
        """Every invalid value as (key, expectation with the value found)."""
        out: list[tuple[str, str]] = []
        scheme = urlsplit(self.url).scheme
        if self.url != "memory://" and scheme not in ("redis", "rediss", "unix"):
            out.append(("url", f"must be memory:// or redis://HOST:PORT[/DB], "
                               f"got {_redact(self.url)}"))
        if not _PREFIX_RE.match(self.key_prefix):
            out.append(("key_prefix", f"must use only letters, digits and : _ . - {{ }}, "
                                      f"got {self.key_prefix!r}"))
        if self.checkpoint_every_fixes < 1:
            out.append(("checkpoint_every_fixes", f"must be >= 1, "
                                                  f"got {self.checkpoint_every_fixes}"))
        for key in ("checkpoint_every_s", "idle_ttl_s"):
            value = getattr(self, key)
            if not (math.isfinite(value) and value > 0):
                out.append((key, f"must be a positive number of seconds, got {value}"))
        if not (math.isfinite(self.park_after_s) and self.park_after_s >= 0):
            out.append(("park_after_s", f"must be 0 (off) or a positive number of seconds, "
                                        f"got {self.park_after_s}"))
        return out


@dataclass(frozen=True, kw_only=True)
class GroupConfig:
    """``[group]``: scale-out across worker processes by shard leases in Redis. Seconds.

    ``name`` "" (the default) runs one standalone daemon, as before. A non-empty name
    (``--group NAME``) joins that worker group: vehicles map to ``shards`` shards by a
    stable hash, each worker holds about ``ceil(shards / live workers)`` of them by
    leases of ``lease_s`` seconds (renewed every ``lease_s / 3``), matches only their
    vehicles, and keeps the fixes of other shards for ``buffer_s`` seconds (at most
    ``buffer_max`` per shard) to replay them if it takes such a shard over. ``worker``
    names this process in the group ("" = ``HOSTNAME-PID``); it is also appended to
    ``mqtt.client_id`` so that every worker has its own MQTT session. Needs a Redis
    store whose ``key_prefix`` holds no ``{}`` (the keys carry a shard hash tag).
    ``standby_qos`` (0 or 1; only with a ``{shard}`` topic) is the QoS at which a worker
    subscribes to the shards it stands by for: 0 spares it a PUBACK per kept fix, 1
    keeps those fixes queued at the broker while its connection is down
    (``docs/scale.md``). ``standby = false`` (default true; needs a ``{shard}`` topic)
    runs without standbys: a worker subscribes only to the shards it holds (about 1 / W
    of the feed, where with standbys each of 2 workers receives all of it), and a shard
    whose holder died is restored from its checkpoints only. Per vehicle, the fixes
    published after its last checkpoint and before the new holder's SUBACK are then
    lost: those the dead holder matched (and answered) are missing from the restored
    state, the later ones are never matched or answered. The next fixes of those
    vehicles are matched from the restored state, bridging the gap or restarting the
    match as for any gap in a feed. Hand-overs between live workers lose nothing either
    way (``docs/scale.md``). ``standby_connection`` (default true; it applies with a
    ``{shard}`` topic, standbys and ``standby_qos = 0``, see :meth:`standby_link`)
    receives the standby shards on a second MQTT connection of their own, read when the
    worker is awake for its own shards anyway, so their packets neither wake it nor
    split the batches of the feed it matches; a takeover merges the two connections'
    fixes in publish order. Why on: idle, it halves what standing by adds to a
    worker's CPU (+9.9 % -> +5.0 % within one step) and two workers read 1.59 times one
    against 1.48 (``bench/load.py``, docs/measured.md "Session 22 (lead)"). Where it
    cannot apply the default is silently inert; an explicit ``true`` there is refused.
    ``balance_load`` (a fraction 0..1, default 0.02; it applies in a group with a
    ``{shard}`` topic, and an explicit value above 0 is refused without one) evens the
    workers' load by vehicles, not only their shard counts: the first worker of the
    group's sorted member list counts each shard's vehicles (its checkpoint index)
    and, when the busiest worker carries more than ``balance_load`` times the even
    share above it, writes the counts to Redis as a new snapshot (at most every
    ``6 * lease_s`` while the fleet keeps its size); every worker reads the snapshot's
    version with its heartbeat and computes the same weighted assignment
    (:func:`~livematch.service.shards.assign_shards`). 0 turns it off (the first
    worker then clears a snapshot left by an earlier setting).
    """

    name: str = ""
    worker: str = ""
    shards: int = 64
    lease_s: float = 10.0
    buffer_s: float = 120.0
    buffer_max: int = 20_000
    standby_qos: int = 0
    standby: bool = True
    standby_connection: bool = True
    balance_load: float = 0.02

    def standby_link(self, topic: str) -> bool:
        """Whether a worker of this group receives its standby shards on a second connection.

        Only in a group (``name``), with standbys, at ``standby_qos = 0`` and with a
        ``{shard}`` level in the feed's ``topic``: without the level every worker
        receives the whole feed on one subscription anyway, and at QoS 1 the standby
        subscription would need the session the main connection keeps.

        Example:
            >>> GroupConfig(name="g").standby_link("fleet/{shard}/+/position")
            True
            >>> GroupConfig(name="g").standby_link("fleet/+/position")
            False
            >>> GroupConfig(name="g", standby_qos=1).standby_link("fleet/{shard}/+/position")
            False
        """
        return bool(self.name and self.standby_connection and self.standby
                    and self.standby_qos == 0 and "{shard}" in topic.split("/"))

    def problems(self) -> list[tuple[str, str]]:
        """Every invalid value as (key, expectation with the value found)."""
        out: list[tuple[str, str]] = []
        for key in ("name", "worker"):
            value = getattr(self, key)
            if not _GROUP_NAME_RE.match(value):
                out.append((key, f"must be at most 64 letters, digits or . _ -, got {value!r}"))
        if not 1 <= self.shards <= 16384:
            out.append(("shards", f"must be 1..16384, got {self.shards}"))
        if not (math.isfinite(self.lease_s) and 1.0 <= self.lease_s <= 3600.0):
            out.append(("lease_s", f"must be 1..3600 seconds, got {self.lease_s}"))
        if not (math.isfinite(self.buffer_s) and self.buffer_s >= 0):
            out.append(("buffer_s", f"must be >= 0 seconds, got {self.buffer_s}"))
        if self.buffer_max < 0:
            out.append(("buffer_max", f"must be >= 0, got {self.buffer_max}"))
        if self.standby_qos not in (0, 1):
            out.append(("standby_qos", f"must be 0 or 1, got {self.standby_qos}"))
        if not (math.isfinite(self.balance_load) and 0.0 <= self.balance_load <= 1.0):
            out.append(("balance_load", f"must be a fraction 0..1 (0: off), "
                                        f"got {self.balance_load}"))
        return out


@dataclass(frozen=True, kw_only=True)
class MetricsConfig:
    """``[metrics]``: the HTTP listener for ``/metrics``, ``/healthz`` and ``/readyz``.

    ``listen`` is ``HOST:PORT`` (loopback by default; port 0 picks a free one), or ``""``
    to serve nothing.
    """

    listen: str = "127.0.0.1:9750"

    def problems(self) -> list[tuple[str, str]]:
        """Every invalid value as (key, expectation with the value found)."""
        if self.listen == "":
            return []
        try:
            parse_hostport(self.listen)
        except ValueError as exc:
            return [("listen", f"must be HOST:PORT with PORT 0..65535 ({exc}), "
                               f"got {self.listen!r}")]
        return []


@dataclass(frozen=True, kw_only=True)
class PublishConfig:
    """``[publish]``: what goes out and how outputs wait while the broker is away.

    ``throttle_s`` 0 publishes every assignment; above 0 an assignment is published only
    when the vehicle's road changes or ``throttle_s`` seconds (fix time) passed since its
    last published one (commits, alerts and rejects are never throttled).
    ``retain_latest`` publishes assignments retained, so a new subscriber gets the latest
    state of every vehicle. Up to ``queue_max`` outputs wait while the broker is down
    (intake pauses when full); ``shutdown_grace_s`` bounds the final drain. Rejects
    wait in a queue of their own, sent after the other outputs and bounded by
    ``reject_queue_max``: beyond it a reject is counted but not published
    (``livematch_rejects_suppressed_total{why="queue_full"}``), so a flood of bad input
    neither delays the answers nor grows memory.
    """

    throttle_s: float = 0.0
    retain_latest: bool = False
    queue_max: int = 100_000
    reject_queue_max: int = 10_000
    shutdown_grace_s: float = 10.0

    def problems(self) -> list[tuple[str, str]]:
        """Every invalid value as (key, expectation with the value found)."""
        out: list[tuple[str, str]] = []
        if not (math.isfinite(self.throttle_s) and self.throttle_s >= 0):
            out.append(("throttle_s", f"must be >= 0 seconds, got {self.throttle_s}"))
        if self.queue_max < 1:
            out.append(("queue_max", f"must be >= 1, got {self.queue_max}"))
        if self.reject_queue_max < 0:
            out.append(("reject_queue_max", f"must be >= 0, got {self.reject_queue_max}"))
        if not (math.isfinite(self.shutdown_grace_s) and self.shutdown_grace_s >= 0):
            out.append(("shutdown_grace_s", f"must be >= 0 seconds, got {self.shutdown_grace_s}"))
        return out


@dataclass(frozen=True, kw_only=True)
class LogConfig:
    """``[log]``: the log level (``debug``, ``info``, ``warning``, ``error``)."""

    level: str = "info"

    def problems(self) -> list[tuple[str, str]]:
        """Every invalid value as (key, expectation with the value found)."""
        if self.level not in _LEVELS:
            return [("level", f"must be one of {', '.join(_LEVELS)}, got {self.level!r}")]
        return []


@dataclass(frozen=True, kw_only=True)
class DaemonConfig:
    """The whole validated configuration of ``livematch run``.

    ``feed`` is the ``[feed]`` section (id length, accepted years) completed with the
    topic filter and the payload limit of ``[mqtt]``.
    ``username`` / ``password`` are the resolved MQTT credentials (never logged; the
    ``repr`` hides the password).
    """

    source: str = "<defaults>"
    inputs: InputsConfig = field(default_factory=InputsConfig)
    matcher: MatchSettings = field(default_factory=MatchSettings)
    alerts: AlertSettings = field(default_factory=AlertSettings)
    mqtt: MqttConfig = field(default_factory=MqttConfig)
    store: StoreConfig = field(default_factory=StoreConfig)
    metrics: MetricsConfig = field(default_factory=MetricsConfig)
    publish: PublishConfig = field(default_factory=PublishConfig)
    feed: FeedLimits = field(default_factory=FeedLimits)
    log: LogConfig = field(default_factory=LogConfig)
    record: RecordSettings = field(default_factory=RecordSettings)
    group: GroupConfig = field(default_factory=GroupConfig)
    username: str | None = None
    password: str | None = field(default=None, repr=False)
    store_password: str | None = field(default=None, repr=False)


_SECTIONS: dict[str, type] = {
    "inputs": InputsConfig,
    "mqtt": MqttConfig,
    "store": StoreConfig,
    "metrics": MetricsConfig,
    "publish": PublishConfig,
    "log": LogConfig,
    "record": RecordSettings,
    "group": GroupConfig,
}

# Sections mapped by the pipeline's own functions (so replay and daemon agree) or by
# the feed's limits.
_MAPPED = ("alerts", "feed", "matcher")

# Flags of ``livematch run`` and the key each one sets.
FLAG_KEYS = {
    "network": ("inputs", "network"),
    "routes": ("inputs", "routes"),
    "fences": ("inputs", "fences"),
    "broker": ("mqtt", "url"),
    "store": ("store", "url"),
    "metrics": ("metrics", "listen"),
    "record": ("record", "path"),
    "group": ("group", "name"),
    "shards": ("group", "shards"),
    "worker": ("group", "worker"),
}


def load_config(
    path: str | Path | None,
    *,
    env: Mapping[str, str] | None = None,
    overrides: Mapping[str, Any] | None = None,
) -> DaemonConfig:
    """Read, merge and validate the configuration.

    Args:
        path: the TOML file, or None for defaults only.
        env: environment variables (default ``os.environ``): ``LIVEMATCH__SECTION__KEY``
            overrides and the MQTT credentials.
        overrides: command-line values keyed like :data:`FLAG_KEYS` (``"broker"``...);
            None values are ignored.

    Raises:
        BadConfigError: naming the file (or variable, or flag), the key and what was
            expected; every problem found is listed, one per line.
    """
    env = os.environ if env is None else env
    raw: dict[str, dict[str, tuple[Any, str]]] = {}
    source = str(path) if path is not None else "<defaults>"
    base = Path(path).parent if path is not None else Path.cwd()
    problems: list[str] = []
    if path is not None:
        for section, key, value in _read_file(Path(path)):
            if (section, key) in _PATH_KEYS and isinstance(value, str) and value:
                value = str(base / value)
            raw.setdefault(section, {})[key] = (value, source)
    for name, text in sorted(env.items()):
        if not name.startswith(ENV_PREFIX):
            continue
        parts = name[len(ENV_PREFIX):].lower().split("__")
        if len(parts) != 2 or not all(parts):
            problems.append(f"{name}: must be named {ENV_PREFIX}<SECTION>__<KEY>")
            continue
        raw.setdefault(parts[0], {})[parts[1]] = (_env_value(text), name)
    for flag, value in (overrides or {}).items():
        if value is None:
            continue
        section, key = FLAG_KEYS[flag]
        raw.setdefault(section, {})[key] = (value, f"--{flag}")

    built: dict[str, Any] = {}
    for section, entries in raw.items():
        if section not in _MAPPED and section not in _SECTIONS:
            where = sorted({origin for _, origin in entries.values()})
            known = ", ".join(sorted([*_SECTIONS, *_MAPPED]))
            problems.append(f"{', '.join(where)}: unknown section [{section}] "
                            f"(expected one of {known})")
    for section, cls in _SECTIONS.items():
        entries = raw.get(section, {})
        value, found = _build_section(section, cls, entries)
        problems.extend(found)
        built[section] = value
    built["matcher"], found = _build_mapped("matcher", raw.get("matcher", {}),
                                            matcher_settings_from_mapping, MatchSettings)
    problems.extend(found)
    built["alerts"], found = _build_mapped("alerts", raw.get("alerts", {}),
                                           alert_settings_from_mapping, AlertSettings)
    problems.extend(found)
    feed, feed_problems = _build_feed(built["mqtt"], raw.get("feed", {}))
    problems.extend(feed_problems)
    problems.extend(_group_problems(built["group"], built["store"], built["mqtt"],
                                    raw.get("group", {})))
    username, password, cred_problems = _credentials(built["mqtt"], env, raw.get("mqtt", {}))
    problems.extend(cred_problems)
    store_password, found = _store_password(built["store"], env, raw.get("store", {}))
    problems.extend(found)
    if problems:
        raise BadConfigError("\n".join(problems))
    return DaemonConfig(source=source, feed=feed, username=username, password=password,
                        store_password=store_password, **built)


def parse_hostport(text: str) -> tuple[str, int]:
    """Split ``HOST:PORT`` (IPv6 as ``[::1]:PORT``) into (host, port).

    Example:
        >>> parse_hostport("127.0.0.1:9750"), parse_hostport("[::1]:0")
        (('127.0.0.1', 9750), ('::1', 0))
    """
    host, sep, port_text = text.rpartition(":")
    if not sep or not host:
        raise ValueError("no HOST:PORT")
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    if not port_text.isdigit() or not 0 <= int(port_text) <= 65535:
        raise ValueError(f"bad port {port_text!r}")
    return host, int(port_text)


def redact_url(url: str) -> str:
    """The URL with any password replaced by ``***`` (safe to log)."""
    return _redact(url)


# -- internals -------------------------------------------------------------------------


def _read_file(path: Path) -> list[tuple[str, str, Any]]:
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise BadConfigError(f"{path}: cannot read configuration: {exc.strerror}") from exc
    except UnicodeDecodeError as exc:
        raise BadConfigError(f"{path}: not UTF-8 text: {exc}") from exc
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise BadConfigError(f"{path}: not valid TOML: {exc}") from exc
    out: list[tuple[str, str, Any]] = []
    problems: list[str] = []
    for section, body in doc.items():
        if not isinstance(body, dict):
            problems.append(f"{path}: top-level key {section!r} must be a [section] table")
            continue
        for key, value in body.items():
            out.append((section, key, value))
    if problems:
        raise BadConfigError("\n".join(problems))
    return out


def _env_value(text: str) -> Any:
    """A TOML value (``[15, 30]``, ``true``, ``"x"``), else the text itself."""
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def _build_section(
    section: str, cls: type, entries: Mapping[str, tuple[Any, str]]
) -> tuple[Any, list[str]]:
    hints = typing.get_type_hints(cls)
    names = [f.name for f in fields(cls) if f.init]
    problems: list[str] = []
    kwargs: dict[str, Any] = {}
    origin_of: dict[str, str] = {}
    for key, (value, origin) in entries.items():
        if key not in names:
            problems.append(f"{origin}: unknown key {section}.{key} "
                            f"(expected one of {', '.join(names)})")
            continue
        coerced, expected = _coerce(value, hints[key])
        if expected:
            problems.append(f"{origin}: {section}.{key} must be {expected}, got {value!r}")
            continue
        kwargs[key] = coerced
        origin_of[key] = origin
    if problems:
        return cls(), problems
    obj = cls(**kwargs)
    for key, message in obj.problems():
        where = origin_of.get(key, "<defaults>")
        problems.append(f"{where}: {section}.{key} {message}")
    return obj, problems


def _coerce(value: Any, hint: Any) -> tuple[Any, str]:
    """(value converted to the field's type, "" ) or (None, what was expected)."""
    if hint is bool:
        return (value, "") if isinstance(value, bool) else (None, "true or false")
    if hint is int:
        ok = isinstance(value, int) and not isinstance(value, bool)
        return (value, "") if ok else (None, "an integer")
    if hint is float:
        ok = isinstance(value, int | float) and not isinstance(value, bool)
        return (float(value), "") if ok else (None, "a number")
    if hint is str:
        return (value, "") if isinstance(value, str) else (None, "a string")
    if typing.get_origin(hint) is tuple:
        ok = isinstance(value, list | tuple) and all(
            isinstance(v, int | float) and not isinstance(v, bool) for v in value)
        return (tuple(float(v) for v in value), "") if ok else (None, "a list of numbers")
    return value, ""


def _build_mapped(section_name: str, entries: Mapping[str, tuple[Any, str]],
                  mapper: Any, default: type) -> tuple[Any, list[str]]:
    """A section through the pipeline's own mapper (``[matcher]``, ``[alerts]``).

    Keys are grouped by where they came from (file, variable, flag) so that every
    message names the right origin; then the merged section is mapped once more.
    """
    by_origin: dict[str, dict[str, Any]] = {}
    for key, (value, origin) in entries.items():
        by_origin.setdefault(origin, {})[key] = value
    problems: list[str] = []
    for origin, section in by_origin.items():
        try:
            mapper(section, origin)
        except BadConfigError as exc:
            problems.extend(str(exc).splitlines())
    if problems:
        return default(), problems
    merged = {key: value for key, (value, _) in entries.items()}
    try:
        return mapper(merged, section_name), []
    except BadConfigError as exc:  # valid alone, invalid together
        where = ", ".join(sorted(by_origin))
        return default(), [f"{where}: {line.split(': ', 1)[1]}"
                           for line in str(exc).splitlines()]


def _build_feed(mqtt: MqttConfig, entries: Mapping[str, tuple[Any, str]]
                ) -> tuple[FeedLimits, list[str]]:
    """``[feed]`` plus the transport's topic filter and payload limit as FeedLimits."""
    hints = typing.get_type_hints(FeedLimits)
    owned = {"topic_filter": "mqtt.topic", "max_payload_bytes": "mqtt.max_payload_bytes"}
    names = [f.name for f in fields(FeedLimits) if f.name not in owned]
    problems: list[str] = []
    kwargs: dict[str, Any] = {}
    for key, (value, origin) in entries.items():
        if key in owned:
            problems.append(f"{origin}: feed.{key} is set by {owned[key]}")
            continue
        if key not in names:
            problems.append(f"{origin}: unknown key feed.{key} "
                            f"(expected one of {', '.join(names)})")
            continue
        coerced, expected = _coerce(value, hints[key])
        if expected:
            problems.append(f"{origin}: feed.{key} must be {expected}, got {value!r}")
            continue
        kwargs[key] = coerced
    if problems:
        return FeedLimits(), problems
    try:
        limits = FeedLimits(topic_filter=mqtt.topic, max_payload_bytes=mqtt.max_payload_bytes,
                            **kwargs)
    except ValueError as exc:
        where = sorted({origin for _, origin in entries.values()}) or ["<defaults>"]
        return FeedLimits(), [f"{', '.join(where)}: [feed]/[mqtt] limits: {exc}"]
    return limits, []


def _group_problems(group: GroupConfig, store: StoreConfig, mqtt: MqttConfig,
                    entries: Mapping[str, tuple[Any, str]]) -> list[str]:
    """A worker group needs a Redis store and a key prefix free of hash tags.

    ``group.standby = false`` needs a ``{shard}`` topic: without one every worker
    receives the whole feed anyway, and the setting would silently do nothing.
    """
    out: list[str] = []
    if not group.standby and "{shard}" not in mqtt.topic:
        origin = entries.get("standby", (None, "<defaults>"))[1]
        out.append(f"{origin}: group.standby = false needs a {{shard}} level in mqtt.topic "
                   f"(fleet/{{shard}}/+/position), got {mqtt.topic!r}")
    if (group.standby_connection and "standby_connection" in entries
            and not (group.standby and group.standby_qos == 0 and "{shard}" in mqtt.topic)):
        origin = entries["standby_connection"][1]
        out.append(f"{origin}: group.standby_connection = true needs a {{shard}} level in "
                   f"mqtt.topic, group.standby = true and group.standby_qos = 0")
    if group.balance_load > 0 and "balance_load" in entries and "{shard}" not in mqtt.topic:
        origin = entries["balance_load"][1]
        out.append(f"{origin}: group.balance_load = {group.balance_load} needs a {{shard}} "
                   f"level in mqtt.topic (0 turns it off), got {mqtt.topic!r}")
    if not group.name:
        return out
    origin = entries.get("name", (None, "<defaults>"))[1]
    if store.url == "memory://":
        return [*out, f"{origin}: group.name {group.name!r} needs a Redis store "
                      f"(store.url), got memory://"]
    if "{" in store.key_prefix or "}" in store.key_prefix:
        return [*out, f"{origin}: group.name {group.name!r} needs a store.key_prefix without "
                      f"{{ }} (keys carry the shard as their hash tag), got {store.key_prefix!r}"]
    return out


def _credentials(
    mqtt: MqttConfig, env: Mapping[str, str], entries: Mapping[str, tuple[Any, str]]
) -> tuple[str | None, str | None, list[str]]:
    username = env.get(USERNAME_ENV) or mqtt.username or None
    password = env.get(PASSWORD_ENV)
    if password is None and mqtt.password_file:
        origin = entries.get("password_file", (None, "<defaults>"))[1]
        try:
            password = Path(mqtt.password_file).read_text(encoding="utf-8").strip("\r\n")
        except OSError as exc:
            # Name the file, never its content.
            return None, None, [f"{origin}: mqtt.password_file cannot be read: "
                                f"{mqtt.password_file}: {exc.strerror}"]
    if password is not None and username is None:
        return None, None, [f"{PASSWORD_ENV} or mqtt.password_file gives a password but no "
                            f"username ({USERNAME_ENV} or mqtt.username)"]
    return username, password, []


def _store_password(store: StoreConfig, env: Mapping[str, str],
                    entries: Mapping[str, tuple[Any, str]]) -> tuple[str | None, list[str]]:
    """The Redis password: the environment, else ``store.password_file``, else None."""
    password = env.get(REDIS_PASSWORD_ENV)
    if password is None and store.password_file:
        origin = entries.get("password_file", (None, "<defaults>"))[1]
        try:
            password = Path(store.password_file).read_text(encoding="utf-8").strip("\r\n")
        except OSError as exc:
            # Name the file, never its content.
            return None, [f"{origin}: store.password_file cannot be read: "
                          f"{store.password_file}: {exc.strerror}"]
    return password or None, []


def _redact(url: str) -> str:
    parts = urlsplit(url)
    if parts.password is None:
        return url
    netloc = parts.netloc.replace(f":{parts.password}@", ":***@", 1)
    return parts._replace(netloc=netloc).geturl()


def _valid_name(topic: str) -> bool:
    return bool(topic) and "+" not in topic and "#" not in topic and "\0" not in topic


def _valid_filter(topic: str) -> bool:
    if not topic or "\0" in topic:
        return False
    levels = topic.split("/")
    for i, level in enumerate(levels):
        if "#" in level and (level != "#" or i != len(levels) - 1):
            return False
        if "+" in level and level != "+":
            return False
    return True


def _filter_matches(topic_filter: str, topic: str) -> bool:
    """True when ``topic`` matches the MQTT filter (``+`` one level, ``#`` the rest)."""
    want, have = topic_filter.split("/"), topic.split("/")
    for i, level in enumerate(want):
        if level == "#":
            return True
        if i >= len(have) or (level != "+" and level != have[i]):
            return False
    return len(have) == len(want)
