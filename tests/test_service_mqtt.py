"""MQTT helpers of the daemon against a real mosquitto on loopback."""

from __future__ import annotations

import asyncio
from typing import Any

import aiomqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from services import Collector, Mosquitto

from livematch.service.mqtt import buffered_reads, cap_inflight, lean_receive, publish_now

pytest_plugins = ("fixtures_services",)


async def test_cap_inflight_follows_broker_receive_maximum(mosquitto: Mosquitto,
                                                           prefix: str) -> None:
    """The in-flight bound is min(asked, the broker's Receive Maximum); 150 QoS 1
    publishes at once then all arrive over one connection (PUBACKs read by lean_receive,
    which leaves the sending of queued ones to paho)."""
    # The test broker's config sets max_inflight_messages 100, which mosquitto sends as
    # its Receive Maximum (MQTT 5.0 section 3.2.2.3.3).
    for asked, want in ((500, 100), (50, 50)):
        client = aiomqtt.Client("127.0.0.1", mosquitto.port,
                                protocol=aiomqtt.ProtocolVersion.V5)
        cap_inflight(client, asked)
        lean_receive(client)
        assert client._client._max_inflight_messages == min(asked, 20)  # before CONNACK
        async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/cap/#") as col, client:
            assert client._client._max_inflight_messages == want
            await asyncio.gather(*(client.publish(f"{prefix}/cap/{asked}", b"{}", qos=1)
                                   for _ in range(150)))
            await col.wait_for(f"/cap/{asked}", 150)


async def test_lean_receive_decodes_as_paho(mosquitto: Mosquitto, prefix: str) -> None:
    """Messages read by lean_receive equal paho's own decoding (topic, payload, QoS,
    retain), with and without MQTT 5 properties; its PUBACKs complete publishes."""
    plain = aiomqtt.Client("127.0.0.1", mosquitto.port, protocol=aiomqtt.ProtocolVersion.V5)
    lean = aiomqtt.Client("127.0.0.1", mosquitto.port, protocol=aiomqtt.ProtocolVersion.V5)
    lean_receive(lean)
    user = Properties(PacketTypes.PUBLISH)
    user.UserProperty = ("k", "v")
    sent = [(f"{prefix}/lean/a", b'{"x":1}', 0, None), (f"{prefix}/lean/b", b"", 1, None),
            (f"{prefix}/lean/\u00e9", bytes(range(256)), 1, None),
            (f"{prefix}/lean/p", b"with properties", 1, user),
            (f"{prefix}/lean/q", b"qos 0 with properties", 0, user)]
    got: dict[str, list[tuple[str, bytes, int, bool, str]]] = {}
    async with plain, lean:
        for client in (plain, lean):
            await client.subscribe(f"{prefix}/lean/#", qos=1)
        for topic, payload, qos, props in sent:  # from the lean client: PUBACKs read lean
            await lean.publish(topic, payload, qos=qos, properties=props)
        for name, client in (("plain", plain), ("lean", lean)):
            rows = got.setdefault(name, [])
            async with asyncio.timeout(10):
                async for m in client.messages:
                    kind = ("none" if m.properties is None else "user"
                            if hasattr(m.properties, "UserProperty") else "empty")
                    rows.append((m.topic.value, bytes(m.payload),  # type: ignore[arg-type]
                                 m.qos, m.retain, kind))
                    if len(rows) == len(sent):
                        break
    # paho gives an empty Properties object where the lean path gives None (its sign)
    assert got["plain"] == [(t, p, q, False, "empty" if props is None else "user")
                            for t, p, q, props in sent]
    assert got["lean"] == [(t, p, q, False, "none" if props is None else "user")
                           for t, p, q, props in sent]


async def test_lean_receive_puback_reason_codes_as_paho(mosquitto: Mosquitto,
                                                        prefix: str) -> None:
    """A PUBACK "No matching subscribers" (0x10, MQTT 5.0 section 3.4.2.1) completes the
    publish with the same reason code as paho's decoding; read lean, without new objects."""
    seen: dict[str, list[Any]] = {}
    scans: dict[str, list[int]] = {}
    clients = {}
    for name in ("plain", "lean"):
        client = aiomqtt.Client("127.0.0.1", mosquitto.port,
                                protocol=aiomqtt.ProtocolVersion.V5)
        if name == "lean":
            lean_receive(client)
        paho = client._client
        rows = seen.setdefault(name, [])

        def on_publish(c: Any, u: Any, mid: int, reason: Any, props: Any, *,
                       inner: Any = paho.on_publish, rows: list[Any] = rows) -> None:
            rows.append((reason, props))
            inner(c, u, mid, reason, props)

        paho.on_publish = on_publish
        scans[name] = []  # paho's scan for queued messages after a PUBACK
        paho._update_inflight = (lambda inner=paho._update_inflight, into=scans[name]:
                                 into.append(1) or inner())
        clients[name] = client
    async with clients["plain"], clients["lean"]:
        for name, client in clients.items():
            for k in range(2):  # nobody subscribes to this topic: mosquitto answers 0x10
                await client.publish(f"{prefix}/nobody/{name}/{k}", b"{}", qos=1)
    for name in ("plain", "lean"):
        assert [(r.value, str(r)) for r, _ in seen[name]] == [
            (0x10, "No matching subscribers")] * 2
        assert all(len(p.json()) == 0 for _, p in seen[name])  # no properties
    assert seen["lean"][0][0] is seen["lean"][1][0]  # one shared object: the lean path
    assert seen["plain"][0][0] is not seen["plain"][1][0]
    assert (len(scans["plain"]), len(scans["lean"])) == (2, 0)  # nothing queued: no scan


class _NoSocket:
    """Stands in for a connected socket that is never written to (closing does nothing)."""

    def fileno(self) -> int:
        return -1

    def close(self) -> None:
        return None


async def test_publish_now_packets_equal_paho() -> None:
    """QoS 1 PUBLISH packets and session entries of publish_now equal paho's own publish
    (MQTT 5, no properties) across remaining-length sizes (1..4 bytes, MQTT 5.0
    section 1.5.5), retain, and non-ASCII topics."""
    rows: dict[str, list[tuple[int, bytes, int, int]]] = {"lean": [], "plain": []}
    clients = {}
    for name in rows:
        client = aiomqtt.Client("127.0.0.1", 1, protocol=aiomqtt.ProtocolVersion.V5)
        paho: Any = client._client
        paho._sock = _NoSocket()  # "connected": packets are captured below, never written
        paho._max_inflight_messages = 0  # no in-flight bound
        paho._packet_queue = (lambda command, packet, mid, qos, info=None, *, into=rows[name]:
                              into.append((command, bytes(packet), mid, qos)))
        clients[name] = client
    cases = [("a", b"", False), ("livematch/match/bus-17", b'{"x":1}', True),
             ("fleet/\u00e9t\u00e9/position", b"x" * 100, False)]
    cases += [("t", b"y" * n, False) for n in (119, 120, 121, 16_375, 16_376, 2_097_140,
                                                2_097_145)]
    for topic, payload, retain in cases:
        publish_now(clients["lean"], topic, payload, qos=1, retain=retain)
        clients["plain"]._client.publish(topic, payload, 1, retain)
    assert len(rows["lean"]) == len(cases)
    assert rows["lean"] == rows["plain"]
    lean: Any = clients["lean"]._client
    plain: Any = clients["plain"]._client
    assert lean._inflight_messages == plain._inflight_messages == len(cases)
    for mid, want in plain._out_messages.items():
        got = lean._out_messages[mid]
        assert [getattr(got, k) for k in ("mid", "topic", "payload", "qos", "retain", "dup",
                                          "state", "properties")] == \
            [getattr(want, k) for k in ("mid", "topic", "payload", "qos", "retain", "dup",
                                        "state", "properties")]
        assert got.info.is_published() is False
        got.info._set_as_published()  # what paho calls when the PUBACK is read
        assert got.info.is_published() is True


async def test_publish_now_round_trip_through_broker(mosquitto: Mosquitto, prefix: str) -> None:
    """Messages published with publish_now arrive unchanged (topic, payload, retain) and
    every one is acknowledged (is_published), up to a 300 kB payload."""
    client = aiomqtt.Client("127.0.0.1", mosquitto.port, protocol=aiomqtt.ProtocolVersion.V5)
    lean_receive(client)
    sent = [(f"{prefix}/rt/{k}", bytes([k % 256]) * size)
            for k, size in enumerate((0, 1, 200, 20_000, 300_000))]
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/rt/#") as col, client:
        infos = [publish_now(client, t, p, qos=1, retain=False) for t, p in sent]
        async with asyncio.timeout(10):
            while len(col.messages) < len(sent) or not all(i.is_published() for i in infos):
                await asyncio.sleep(0.01)
    got = {topic: payload for topic, payload, _retain in col.messages}
    assert got == dict(sent)


async def test_buffered_reads_deliver_a_burst_in_order_with_few_reads(
        mosquitto: Mosquitto, prefix: str) -> None:
    """400 messages that arrive together are all delivered, in order, through aiomqtt's
    reader alone (bytes left in the buffer are read on by the scheduled callback), with
    far fewer reads of the socket than paho's three or more per packet."""
    reader = aiomqtt.Client("127.0.0.1", mosquitto.port, protocol=aiomqtt.ProtocolVersion.V5,
                            identifier=f"{prefix}-reader", clean_start=False,
                            properties=_session(600))
    lean_receive(reader)
    buffered_reads(reader)
    sent = [(f"{prefix}/burst/{k % 7}", f'{{"k":{k}}}'.encode()) for k in range(400)]
    got: list[tuple[str, bytes]] = []
    async with reader:
        await reader.subscribe(f"{prefix}/burst/#", qos=1)
        sock: Any = reader._client._sock
        assert type(sock).__name__ == "_BufferedSocket"
        async with aiomqtt.Client("127.0.0.1", mosquitto.port) as writer:
            await asyncio.gather(*(writer.publish(t, p, qos=1) for t, p in sent))
        async with asyncio.timeout(20):
            async for m in reader.messages:
                got.append((m.topic.value, bytes(m.payload)))  # type: ignore[arg-type]
                if len(got) == len(sent):
                    break
        reads = sock.reads
    assert got == sent
    assert reads < len(sent) // 4  # paho alone: at least 3 per PUBLISH (9 in a quiet run)


def _session(expiry: int) -> Properties:
    props = Properties(PacketTypes.CONNECT)
    props.SessionExpiryInterval = expiry
    return props
