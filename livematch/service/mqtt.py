"""The MQTT side of the daemon: building the client, acknowledging, backing off.

The daemon speaks MQTT v5 through aiomqtt (itself on paho-mqtt) with:

- a fixed client id and ``clean_start`` false plus a session expiry, so the broker keeps
  the subscription and queues QoS 1 fixes while the daemon restarts;
- manual acknowledgement: a fix is PUBACKed only after it has been matched and its
  outputs queued for publishing, so a fix the daemon never got to (SIGTERM, crash) stays
  unacknowledged and the broker delivers it again on the next session. Messages are
  acknowledged in the order they arrived, as MQTT requires;
- no Maximum Packet Size property: an oversize fix must reach us so that it lands on
  the dead-letter topic with reason ``too_large`` instead of being dropped by the broker.
"""

from __future__ import annotations

import logging
import random
import socket
import ssl
from urllib.parse import urlsplit

import aiomqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from livematch.config import MqttConfig

# paho logs every packet at debug level; keep it to warnings (no payloads, no secrets).
_PAHO_LOG = logging.getLogger("livematch.mqtt.paho")
_PAHO_LOG.setLevel(logging.WARNING)


def make_client(config: MqttConfig, *, username: str | None, password: str | None,
                timeout_s: float = 10.0) -> aiomqtt.Client:
    """A not-yet-connected aiomqtt client for ``config`` (use it as ``async with``).

    ``mqtts://`` uses TLS with the system's trust store, or ``config.ca_file`` when set.
    Must be called inside a running event loop (aiomqtt binds to it).
    """
    parts = urlsplit(config.url)
    tls = parts.scheme == "mqtts"
    context = ssl.create_default_context(cafile=config.ca_file or None) if tls else None
    port = parts.port or (8883 if tls else 1883)
    props = Properties(PacketTypes.CONNECT)
    props.SessionExpiryInterval = config.session_expiry_s
    client = aiomqtt.Client(
        parts.hostname or "localhost",
        port,
        username=username,
        password=password,
        identifier=config.client_id,
        protocol=aiomqtt.ProtocolVersion.V5,
        clean_start=False,
        keepalive=config.keepalive_s,
        properties=props,
        tls_context=context,
        timeout=timeout_s,
        logger=_PAHO_LOG,
        # Small packets (PUBACKs, assignments) must not wait for Nagle's algorithm.
        socket_options=[(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)],
    )
    # aiomqtt has no switch for manual acknowledgement; paho's public manual_ack_set on
    # the wrapped client is the documented way (paho-mqtt >= 2.0).
    client._client.manual_ack_set(True)
    # The daemon keeps a window of publishes in flight on purpose; aiomqtt would warn
    # about every one beyond 10.
    client.pending_calls_threshold = 1000
    return client


def ack(client: aiomqtt.Client, message: aiomqtt.Message) -> None:
    """PUBACK ``message`` now (QoS 0 messages need none)."""
    if message.qos > 0:
        client._client.ack(message.mid, message.qos)


def backoff_delays(min_s: float, max_s: float, *, rng: random.Random | None = None
                   ) -> _Backoff:
    """Exponential reconnect delays from ``min_s`` doubling to ``max_s``, with jitter.

    Each delay is drawn uniformly from [d/2, d] ("equal jitter", common practice) so that
    many daemons losing one broker do not come back in lockstep.

    Example:
        >>> b = backoff_delays(1.0, 4.0, rng=random.Random(0))
        >>> [round(b.next(), 3) for _ in range(4)]
        [0.922, 1.758, 2.841, 2.518]
        >>> b.reset(); 0.5 <= b.next() <= 1.0   # back to the start after a success
        True
    """
    return _Backoff(min_s, max_s, rng or random.Random())


class _Backoff:
    """State of :func:`backoff_delays`."""

    def __init__(self, min_s: float, max_s: float, rng: random.Random) -> None:
        self.min_s, self.max_s, self._rng = min_s, max_s, rng
        self._current = min_s

    def next(self) -> float:
        """The next delay in seconds (grows until :meth:`reset`)."""
        d = self._current
        self._current = min(self.max_s, self._current * 2)
        return self._rng.uniform(d / 2, d)

    def reset(self) -> None:
        """Start again from ``min_s`` (after a successful connection)."""
        self._current = self.min_s
