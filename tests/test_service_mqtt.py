"""MQTT helpers of the daemon against a real mosquitto on loopback."""

from __future__ import annotations

import asyncio

import aiomqtt
from services import Collector, Mosquitto

from livematch.service.mqtt import cap_inflight

pytest_plugins = ("fixtures_services",)


async def test_cap_inflight_follows_broker_receive_maximum(mosquitto: Mosquitto,
                                                           prefix: str) -> None:
    """The in-flight bound is min(asked, the broker's Receive Maximum); 150 QoS 1
    publishes at once then all arrive over one connection."""
    # The test broker's config sets max_inflight_messages 100, which mosquitto sends as
    # its Receive Maximum (MQTT 5.0 section 3.2.2.3.3).
    for asked, want in ((500, 100), (50, 50)):
        client = aiomqtt.Client("127.0.0.1", mosquitto.port,
                                protocol=aiomqtt.ProtocolVersion.V5)
        cap_inflight(client, asked)
        assert client._client._max_inflight_messages == min(asked, 20)  # before CONNACK
        async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/cap/#") as col, client:
            assert client._client._max_inflight_messages == want
            await asyncio.gather(*(client.publish(f"{prefix}/cap/{asked}", b"{}", qos=1)
                                   for _ in range(150)))
            await col.wait_for(f"/cap/{asked}", 150)
