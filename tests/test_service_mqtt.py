"""MQTT helpers of the daemon against a real mosquitto on loopback."""

from __future__ import annotations

import asyncio
import select
import socket
import ssl
from typing import Any

import aiomqtt
import paho.mqtt.client as paho_client
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from services import WAIT_S, Collector, Mosquitto

from livematch.service.mqtt import (
    ReceivedTopic,
    _BufferedSocket,
    buffered_reads,
    cap_inflight,
    lean_receive,
    on_acknowledged,
    publish_now,
    read_now,
)

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
    # handed to a callable directly (the daemon's intake queue), read from whole packets
    # in the socket buffer (buffered_reads): the same messages as paho's decoding
    direct = aiomqtt.Client("127.0.0.1", mosquitto.port, protocol=aiomqtt.ProtocolVersion.V5)
    delivered: list[aiomqtt.Message] = []
    lean_receive(direct, deliver=delivered.append)
    user = Properties(PacketTypes.PUBLISH)
    user.UserProperty = ("k", "v")
    sent = [(f"{prefix}/lean/a", b'{"x":1}', 0, None), (f"{prefix}/lean/b", b"", 1, None),
            (f"{prefix}/lean/\u00e9", bytes(range(256)), 1, None),
            (f"{prefix}/lean/p", b"with properties", 1, user),
            (f"{prefix}/lean/q", b"qos 0 with properties", 0, user)]
    got: dict[str, list[tuple[str, bytes, int, bool, str]]] = {}
    async with plain, lean, direct:
        buffered_reads(direct)  # wraps the socket opened from now on: none yet
        for client in (plain, lean, direct):
            await client.subscribe(f"{prefix}/lean/#", qos=1)
        for topic, payload, qos, props in sent:  # from the lean client: PUBACKs read lean
            await lean.publish(topic, payload, qos=qos, properties=props)
        async with asyncio.timeout(WAIT_S):
            while len(delivered) + direct._queue.qsize() < len(sent):
                await asyncio.sleep(0.01)
        while not direct._queue.empty():  # with properties: paho's way, aiomqtt's queue
            delivered.append(direct._queue.get_nowait())
        for name, client in (("plain", plain), ("lean", lean)):
            rows = got.setdefault(name, [])
            async with asyncio.timeout(WAIT_S):
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
    rows = [(m.topic.value, m.payload, m.qos, m.retain, m.properties is None)
            for m in delivered]
    assert sorted(rows) == sorted((t, p, q, False, props is None) for t, p, q, props in sent)
    assert {type(m.topic) for m in delivered if m.properties is None} == {ReceivedTopic}


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
        async with asyncio.timeout(WAIT_S):
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


class _Chunks:
    """A socket whose ``recv`` returns the given pieces one by one, then would block."""

    def __init__(self, pieces: list[bytes]) -> None:
        self.pieces = list(reversed(pieces))

    def recv(self, n: int) -> bytes:
        if not self.pieces:
            raise BlockingIOError
        piece = self.pieces.pop()
        if len(piece) > n:
            self.pieces.append(piece[n:])
        return piece[:n]

    def fileno(self) -> int:
        return -1

    def close(self) -> None:
        return None


def _publish_packet(topic: str, payload: bytes, mid: int, qos: int) -> bytes:
    """A PUBLISH as paho writes it (MQTT 5, no properties), for feeding a reader."""
    packets: list[bytes] = []
    client = aiomqtt.Client("127.0.0.1", 1, protocol=aiomqtt.ProtocolVersion.V5)
    paho: Any = client._client
    paho._sock = _NoSocket()
    paho._max_inflight_messages = 0
    paho._mid_generate = lambda: mid
    paho._packet_queue = lambda command, packet, *_a, **_k: packets.append(bytes(packet))
    paho.publish(topic, payload, qos, False)
    return packets[0]


def _read_stream(pieces: list[bytes], lean: bool, take: Any = None,
                 calls: int | None = None) -> tuple[list[Any], list[Any]]:
    """Feed ``pieces`` to a paho client's reader, ours (``lean_receive`` and
    ``buffered_reads``, with ``take`` as its hook) or paho's own, with PUBLISHes 7 and 8
    awaiting their PUBACK: the messages delivered (topic, payload, QoS, id) and the
    PUBACKs seen (id, reason code)."""
    client = aiomqtt.Client("127.0.0.1", 1, protocol=aiomqtt.ProtocolVersion.V5)
    paho: Any = client._client
    got: list[Any] = []
    acked: list[Any] = []
    if lean:
        lean_receive(client, deliver=got.append)
        buffered_reads(client, take=take)
        paho.on_socket_open(paho, None, _Chunks(pieces))
    else:
        paho._sock = _Chunks(pieces)
        paho.on_message = lambda _c, _u, m: got.append(m)
    paho._protocol = 5
    paho.on_publish = lambda _c, _u, mid, reason, _p: acked.append((mid, reason.value))
    for mid in (7, 8):  # awaiting their PUBACK
        message = paho_client.MQTTMessage(mid, b"out")
        message.qos = 1
        message.info = paho_client.MQTTMessageInfo(mid)
        paho._out_messages[mid] = message
        paho._inflight_messages += 1
    for _ in range(calls if calls is not None else len(pieces) + 100):
        paho.loop_read()
    return ([(m.topic if isinstance(m.topic, str) else m.topic.value, bytes(m.payload),
              m.qos, m.mid) for m in got], acked)


async def test_buffered_reads_whole_packets_equal_paho_at_every_split() -> None:
    """Packets read whole from the buffer give paho the same messages and PUBACK
    dispatch as its own reader, however the stream is cut into reads: PUBLISH QoS 0 and
    1 with remaining lengths of one to three bytes (MQTT 5.0 section 1.5.5), PUBACKs
    with and without a reason code, cut at every byte of the first 300 and in odd
    pieces after that."""
    stream = [_publish_packet("fleet/v1/position", b'{"k":1}', 1, 1),
              bytes((0x40, 2, 0, 7)),  # PUBACK of 7, success
              _publish_packet("fleet/v\u00e9/position", b"x" * 200, 2, 1),
              bytes((0x40, 3, 0, 8, 0x10)),  # PUBACK of 8, "No matching subscribers"
              _publish_packet("a", b"", 0, 0),
              _publish_packet("fleet/v2/position", b"y" * 20_000, 3, 1)]
    data = b"".join(stream)
    cuts = [[data[:k], data[k:]] for k in range(1, 300)]
    cuts.append([data[k:k + 37] for k in range(0, len(data), 37)])
    cuts.append([data])

    def read(pieces: list[bytes], lean: bool) -> tuple[list[Any], list[Any]]:
        return _read_stream(pieces, lean)

    want = read([data], lean=False)
    assert len(want[0]) == 4 and want[1] == [(7, 0), (8, 0x10)]
    for pieces in cuts:
        assert read(pieces, lean=True) == want


async def test_buffered_reads_take_sees_whole_publishes_and_leaves_the_rest_to_paho() -> None:
    """A ``take`` hook is offered every whole PUBLISH (first byte and body, as paho
    writes them) and nothing else; what it takes never reaches paho, what it leaves
    reaches paho's dispatch exactly as paho's own reader gives it (checked against
    paho's reading of the whole stream), at every cut of the stream; taken packets do
    not count against the bound of packets per read call (one call reads 40 taken and
    the 16 others)."""
    kept = [_publish_packet(f"kept/{k % 3}", f'{{"k":{k}}}'.encode(), 0, 0) for k in range(40)]
    other = [_publish_packet(f"fleet/v{k}/position", b"z" * (k * 13), k + 1, 1)
             for k in range(14)]
    stream = []
    for k, packet in enumerate(kept):
        stream.append(packet)
        if k % 3 == 0 and other:
            stream.append(other.pop())
    stream[5:5] = [bytes((0x40, 2, 0, 7)), bytes((0x40, 3, 0, 8, 0x10))]  # PUBACKs
    stream += other
    data = b"".join(stream)

    def read(pieces: list[bytes], take: bool, calls: int | None = None
             ) -> tuple[list[Any], list[Any], list[tuple[int, bytes]]]:
        offered: list[tuple[int, bytes]] = []
        taken: list[tuple[int, bytes]] = []

        def hook(command: int, body: bytes) -> bool:
            offered.append((command, body))
            if body[2:2 + ((body[0] << 8) | body[1])].startswith(b"kept/"):
                taken.append((command, body))
                return True
            return False

        got, acked = _read_stream(pieces, take, hook, calls)
        assert all(c & 0xF0 == 0x30 for c, _ in offered)  # PUBLISH packets only
        return got, acked, taken

    paho_got, paho_acked, _ = read([data], take=False)
    assert len(paho_got) == len(kept) + 14 and paho_acked == [(7, 0), (8, 0x10)]
    want_kept = [(t, p) for t, p, _q, _m in paho_got if t.startswith("kept/")]
    want_rest = [m for m in paho_got if not m[0].startswith("kept/")]
    cuts = [[data[:k], data[k:]] for k in range(1, 200)]
    cuts.append([data[:len(data) - len(b"".join(stream[-3:]))],  # between two packets
                 b"".join(stream[-3:])])
    cuts.append([data[k:k + 29] for k in range(0, len(data), 29)])
    cuts.append([data])
    for pieces in cuts:
        got, acked, taken = read(pieces, take=True)
        # a packet cut by the end of a read is left to paho's reader, taken or not
        assert ([m for m in got if not m[0].startswith("kept/")], acked) == (
            want_rest, paho_acked)
        assert all(command == 0x30 for command, _ in taken)
        seen = [(b[2:2 + ((b[0] << 8) | b[1])].decode(), b[3 + ((b[0] << 8) | b[1]):])
                for _, b in taken] + [(t, p) for t, p, _q, _m in got if t.startswith("kept/")]
        assert sorted(seen, key=want_kept.index) == want_kept  # each once, taken or not
        if len(pieces) == 1 or len(pieces[0]) == len(data) - len(b"".join(stream[-3:])):
            assert len(taken) == len(kept)
    got, acked, taken = read([data], take=True, calls=1)  # one read call, one buffer
    assert len(taken) == len(kept) and len(got) == 14 and len(acked) == 2


async def test_on_acknowledged_wakes_aiomqtt_only_for_its_own_publishes(
        mosquitto: Mosquitto, prefix: str) -> None:
    """Every PUBACK calls the callback; aiomqtt's own handler (which raises and
    swallows a KeyError for a message it does not wait for) is called only for
    messages published through aiomqtt, whose publish calls still complete."""
    client = aiomqtt.Client("127.0.0.1", mosquitto.port, protocol=aiomqtt.ProtocolVersion.V5)
    lean_receive(client)
    looked_up: list[int] = []

    class Pending(dict[int, asyncio.Event]):
        def pop(self, mid: int, *default: Any) -> asyncio.Event:
            looked_up.append(mid)
            return super().pop(mid, *default)

    client._pending_publishes = Pending()
    acked: list[int] = []
    on_acknowledged(client, acked.append)
    async with client:
        infos = [publish_now(client, f"{prefix}/ack/{k}", b"{}", qos=1, retain=False)
                 for k in range(5)]
        await asyncio.wait_for(asyncio.gather(*(
            client.publish(f"{prefix}/ack/a{k}", b"{}", qos=1) for k in range(3))), WAIT_S)
        async with asyncio.timeout(WAIT_S):
            while not all(i.is_published() for i in infos):
                await asyncio.sleep(0.01)
    assert sorted(acked) == sorted({i.mid for i in infos} | set(looked_up))
    assert len(acked) == 8
    assert len(looked_up) == 3  # aiomqtt's three, each found (no KeyError)
    assert not set(looked_up) & {i.mid for i in infos}


async def test_buffered_socket_next_packet_leaves_a_malformed_length_to_paho() -> None:
    """A remaining length of five bytes (MQTT 5.0 section 1.5.5 allows four) is not
    taken from the buffer: paho's reader finds it and reports a protocol error."""
    sock = _BufferedSocket(None, lambda: None)
    sock._buf = bytes((0x30, 0xFF, 0xFF, 0xFF, 0xFF, 0x01)) + b"x" * 10
    assert sock.next_packet() is None
    assert sock.leftover() == 16
    client = aiomqtt.Client("127.0.0.1", 1, protocol=aiomqtt.ProtocolVersion.V5)
    buffered_reads(client)
    paho: Any = client._client
    paho.on_socket_open(paho, None, _Chunks([sock._buf]))
    assert paho.loop_read() == paho_client.MQTT_ERR_PROTOCOL


def test_buffered_socket_has_the_sockets_fileno_and_tls_pending() -> None:
    """``fileno`` and a TLS socket's ``pending`` are the socket's own, the latter also
    looked up once as ``tls_pending`` (``drain`` asks for both after every matched
    message): ``select`` sees the wrapper readable when the kernel holds bytes for the
    socket; a plain socket has no ``pending`` (``hasattr`` False, as aiomqtt's reader
    asks to tell TLS; ``tls_pending`` None) and an ``ssl.SSLSocket`` (Python's ssl
    module) its own bound method."""
    near, far = socket.socketpair()
    tls = ssl.create_default_context().wrap_socket(socket.socket(), server_hostname="x",
                                                   do_handshake_on_connect=False)
    try:
        wrapped = _BufferedSocket(near, lambda: None)
        assert wrapped.fileno() == near.fileno()
        assert not hasattr(wrapped, "pending") and not hasattr(near, "pending")
        assert wrapped.tls_pending is None
        assert select.select([wrapped], [], [], 0)[0] == []
        far.send(b"\x40\x02\x00\x01")
        assert select.select([wrapped], [], [], 1.0)[0] == [wrapped]
        over_tls = _BufferedSocket(tls, lambda: None)
        assert hasattr(over_tls, "pending") and over_tls.pending == tls.pending
        assert over_tls.tls_pending == tls.pending
        assert over_tls.tls_pending is not None and over_tls.tls_pending() == tls.pending() == 0
        assert over_tls.fileno() == tls.fileno()
    finally:
        near.close()
        far.close()
        tls.close()


def _session(expiry: int) -> Properties:
    props = Properties(PacketTypes.CONNECT)
    props.SessionExpiryInterval = expiry
    return props


class _Kernel:
    """A socket holding ``data`` now (as a kernel's receive buffer): ``recv(n)`` returns
    up to ``n`` bytes of it, then would block; counts the calls."""

    def __init__(self, data: bytes) -> None:
        self.data = data
        self.calls = 0

    def recv(self, n: int) -> bytes:
        self.calls += 1
        if not self.data:
            raise BlockingIOError
        piece, self.data = self.data[:n], self.data[n:]
        return piece

    def fileno(self) -> int:
        return -1

    def close(self) -> None:
        return None


async def test_read_now_reads_what_is_there_with_one_recv_per_piece() -> None:
    """``read_now`` (the standby connection's read) gives paho's dispatch every packet
    the socket holds, as paho's own reader gives them (PUBLISHes of every size, cut
    across reads of 64 KiB), asking the socket once per 64 KiB piece and once more only
    when the last piece was full: 3 KiB waiting is one ``recv``; 180 KiB three (two
    full pieces, then the rest); nothing waiting, one that finds nothing. ``max_reads``
    bounds the calls of the reader, and what is left is read by the next call."""
    packets = [_publish_packet(f"fleet/v{k % 7}/position", b"p" * (k * 37 % 900), 0, 0)
               for k in range(400)]
    for data, want_calls in ((b"".join(packets[:20]), 1), (b"".join(packets), None),
                             (b"", 1)):
        want, _ = _read_stream([data], lean=False, calls=2000)  # paho's own reader
        client = aiomqtt.Client("127.0.0.1", 1, protocol=aiomqtt.ProtocolVersion.V5)
        paho: Any = client._client
        got: list[Any] = []
        lean_receive(client, deliver=got.append)
        buffered_reads(client)
        kernel = _Kernel(data)
        paho.on_socket_open(paho, None, kernel)
        paho._protocol = 5
        read_now(client, 1000)
        full = len(data) // 65_536
        assert kernel.calls == (want_calls if want_calls is not None else full + 1)
        assert [(m.topic.value, bytes(m.payload)) for m in got] == \
            [(m[0], m[1]) for m in want]
    assert len(b"".join(packets)) > 2 * 65_536  # the second case has full pieces
    client = aiomqtt.Client("127.0.0.1", 1, protocol=aiomqtt.ProtocolVersion.V5)
    paho = client._client
    got = []
    lean_receive(client, deliver=got.append)
    buffered_reads(client)
    kernel = _Kernel(b"".join(packets))
    paho.on_socket_open(paho, None, kernel)
    paho._protocol = 5
    # two calls of the reader: a recv and up to 16 packets each (none taken here)
    assert read_now(client, 2) == 2 and kernel.calls <= 2 and 0 < len(got) <= 32
    read_now(client, 1000)
    assert len(got) == len(packets)
