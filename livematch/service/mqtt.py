"""The MQTT side of the daemon: building the client, acknowledging, backing off.

The daemon speaks MQTT v5 through aiomqtt (itself on paho-mqtt) with:

- a fixed client id and ``clean_start`` false plus a session expiry, so the broker keeps
  the subscription and queues QoS 1 fixes while the daemon restarts;
- manual acknowledgement: a fix is PUBACKed only after it has been matched and its
  outputs queued for publishing, so a fix the daemon never got to (SIGTERM, crash) stays
  unacknowledged and the broker delivers it again on the next session. Messages are
  acknowledged in the order they arrived, as MQTT requires;
- no Maximum Packet Size property: an oversize fix must reach us so that it lands on
  the dead-letter topic with reason ``too_large`` instead of being dropped by the broker;
- a bounded intake queue (:class:`IntakeQueue`, ``mqtt.intake_max``): when messages
  arrive faster than they are matched, the oldest waiting message of a vehicle that has
  a newer one waiting is shed, so memory stays bounded and every vehicle's newest fix
  is kept. QoS 1 messages are also flow-controlled by the broker (the session's Receive
  Maximum is ``intake_max``), so QoS 1 alone never fills the queue; they are shed only
  when QoS 0 traffic fills it too. A shed QoS 1 message is acknowledged (it was
  dropped on purpose and counted in ``livematch_fixes_shed_total``), in its arrival
  order, when the receive loop reaches its place.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import logging
import math
import random
import select
import socket
import ssl
import threading
import time
from collections import deque
from collections.abc import Awaitable, Callable
from typing import Any, TypeVar
from urllib.parse import urlsplit

import aiomqtt
from paho.mqtt.client import (
    MQTT_LOG_DEBUG,
    MQTT_LOG_ERR,
    MQTTMessage,
    mqtt_ms_invalid,
    mqtt_ms_wait_for_puback,
    time_func,
)
from paho.mqtt.enums import CallbackAPIVersion, MQTTErrorCode
from paho.mqtt.exception import MalformedPacket
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.reasoncodes import ReasonCode

from livematch.config import MqttConfig

T = TypeVar("T")

# paho logs every packet at debug level; keep it to warnings (no payloads, no secrets).
_PAHO_LOG = logging.getLogger("livematch.mqtt.paho")
_PAHO_LOG.setLevel(logging.WARNING)


def make_client(config: MqttConfig, *, username: str | None, password: str | None,
                timeout_s: float = 10.0, intake: IntakeQueue | None = None
                ) -> aiomqtt.Client:
    """A not-yet-connected aiomqtt client for ``config`` (use it as ``async with``).

    ``mqtts://`` uses TLS with the system's trust store, or ``config.ca_file`` when set.
    ``intake`` replaces aiomqtt's unbounded incoming queue (the daemon gives an
    :class:`IntakeQueue`). Must be called inside a running event loop (aiomqtt binds to it).
    """
    parts = urlsplit(config.url)
    tls = parts.scheme == "mqtts"
    context = ssl.create_default_context(cafile=config.ca_file or None) if tls else None
    port = parts.port or (8883 if tls else 1883)
    props = Properties(PacketTypes.CONNECT)
    props.SessionExpiryInterval = config.session_expiry_s
    # MQTT v5 flow control: the broker sends at most this many QoS 1/2 messages not yet
    # acknowledged, so a QoS 1 backlog waits at the broker (nothing lost) instead of
    # being shed here; QoS 0 has no flow control and is bounded by the IntakeQueue.
    props.ReceiveMaximum = min(65_535, config.intake_max)
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
    if intake is not None:
        # aiomqtt reads its incoming queue from this attribute (put in its on_message
        # callback, get in client.messages); its own bound would drop the NEWEST message
        # silently and leave a QoS 1 one unacknowledged for the rest of the session.
        client._queue = intake
    return client


def drain(client: aiomqtt.Client, max_packets: int, budget_s: float = math.inf) -> int:
    """Read about ``max_packets`` packets already waiting on the socket; return how many.

    aiomqtt reads one packet (or one per publish in flight) each time the event loop sees
    the socket readable, and the daemon matches one message between two such turns, so
    a backlog would wait in the kernel and at the broker, where a vehicle's newest fix
    queues behind its older ones (or is dropped by the broker's own limits). Draining
    moves the backlog into the :class:`IntakeQueue`, which keeps every vehicle's newest
    fix. Reading is cheap next to matching (tens of microseconds against milliseconds).
    Errors are left for aiomqtt's own reader to find and report.

    Reading stops early once ``budget_s`` seconds have passed: everything else in the
    process (lease renewals, acknowledgements) waits while a turn of the event loop
    lasts, and on a busy machine a matched message and the 100 packets read after it
    took 80-400 ms of wall time (fault suite, load average 6-8), about three quarters
    of it reading; what is left is read in a later turn.
    """
    paho = client._client
    read = 0
    until = time.monotonic() + budget_s
    with contextlib.suppress(Exception):
        while read < max_packets and time.monotonic() < until:
            sock = paho.socket()
            if sock is None:
                break
            # a TLS socket's decrypted bytes (looked up once by buffered_reads' wrapper)
            pending = (sock.tls_pending if type(sock) is _BufferedSocket
                       else getattr(sock, "pending", None))
            leftover = getattr(sock, "leftover", None)  # buffered_reads' bytes
            if not ((pending is not None and pending() > 0)
                    or (leftover is not None and leftover() > 0)):
                ready, _, _ = select.select([sock], [], [], 0)
                if not ready:
                    break
            # paho's loop_read ignores its argument and reads one packet per message
            # in flight (ours: up to the publish window), so one call may read dozens:
            # count them, or "100 packets" becomes thousands and stalls the event loop
            # for seconds under a backlog (measured: leases expired in the fault suite).
            per_call = len(getattr(paho, "_out_messages", ())) + len(
                getattr(paho, "_in_messages", ()))
            paho.loop_read()
            read += max(_READ_PACKETS_MIN, per_call)  # _read_packets' bound
    return read


def read_now(client: aiomqtt.Client, max_reads: int, budget_s: float = math.inf) -> int:
    """Read what a socket the event loop does not watch holds now; return the calls.

    For the daemon's standby connection (``group.standby_connection``), read when the
    worker is awake anyway: through :func:`buffered_reads`' reader, one ``recv`` of up
    to ``_READ_SIZE`` bytes at a time, again only while the last one filled the whole
    piece (the kernel may hold more), whole packets are left in the buffer or a TLS
    socket has decrypted bytes pending; at most ``max_reads`` calls of that reader (each
    makes one ``recv`` at most and hands paho up to its bound of packets not taken) or
    ``budget_s`` seconds. :func:`drain` asks ``select`` before every read and once more after the
    last: three system calls for the usual few KiB, here one (or one that finds
    nothing). A socket not wrapped by :func:`buffered_reads` is left to :func:`drain`.
    Errors are left for the connection's own checks, as in :func:`drain`.
    """
    paho: Any = client._client
    sock = paho.socket()
    if not isinstance(sock, _BufferedSocket):
        return drain(client, max_reads * _READ_PACKETS_MIN, budget_s)
    reads = 0
    until = time.monotonic() + budget_s
    with contextlib.suppress(Exception):
        while reads < max_reads:
            sock.got = 0
            paho.loop_read()
            reads += 1
            if paho.socket() is not sock or time.monotonic() >= until:
                break
            pending = sock.tls_pending  # a TLS socket's decrypted bytes
            if not (sock.got >= _READ_SIZE or sock.leftover()
                    or (pending is not None and pending() > 0)):
                break
    return reads


def hold_reads(client: aiomqtt.Client) -> Callable[[], None]:
    """Stop the event loop watching the broker's socket; return what watches it again.

    For ``mqtt.gather_s``: while a worker gathers fixes, bytes that arrive must not wake
    its event loop (each wake-up costs tens of microseconds of CPU, ``bench/load.py
    --loop-cost``); the kernel holds them and :func:`drain` reads them afterwards. The
    reader registered for the socket (aiomqtt's) is taken from the loop's selector and
    registered again, unchanged, by the function returned; that function does nothing
    when the socket was closed or replaced meanwhile (its reader went with it), and
    calling it twice registers once. Nothing is held, and the function returned does
    nothing, when the socket is not open or no reader watches it.

    Example:
        >>> class _Paho:
        ...     def socket(self): return None
        >>> class _Client:
        ...     _client = _Paho()
        >>> hold_reads(_Client())()  # degenerate: no socket, nothing held or resumed
    """
    paho: Any = client._client
    sock = paho.socket()
    if sock is None:
        return _nothing
    loop: Any = asyncio.get_running_loop()
    fd = sock.fileno()
    try:
        reader = loop._selector.get_key(fd).data[0]  # the loop's Handle, or None
    except (AttributeError, KeyError, ValueError):
        return _nothing
    if reader is None or reader.cancelled():
        return _nothing
    callback, args = reader._callback, reader._args
    loop.remove_reader(fd)
    held = [True]

    def resume() -> None:
        if held[0]:
            held[0] = False
            if paho.socket() is sock:
                loop.add_reader(fd, callback, *args)

    return resume


def _nothing() -> None:
    """What :func:`hold_reads` returns when it held nothing."""


# Bytes asked of the kernel per read of the broker's socket (buffered_reads).
_READ_SIZE = 65_536
# Fewest whole packets handed to paho per read call (_read_packets; paho's own bound is
# one per message in flight). A worker that publishes nothing (it only keeps fixes for
# another worker, at QoS 0) would otherwise take one turn of the event loop per packet.
_READ_PACKETS_MIN = 16


class _BufferedSocket:
    """paho's socket, read in pieces of up to ``_READ_SIZE`` bytes (see buffered_reads).

    ``recv(n)`` returns up to ``n`` bytes of what an earlier read left over, else reads
    up to ``max(n, _READ_SIZE)`` from the socket and keeps the rest; an empty read
    (the broker closed) or an error (``BlockingIOError``, TLS "want read") is passed
    through as the socket gave it. Everything else is the socket's own (``send``,
    ``fileno``, ``close``, ``pending`` of a TLS socket...). ``on_leftover`` is called
    whenever a ``recv`` leaves bytes behind, which the event loop would not report
    (they are no longer in the kernel).

    Example (a degenerate "socket" that has six bytes, then nothing)::

        >>> class Six:
        ...     data = [b"abcdef"]
        ...     def recv(self, n):
        ...         if not self.data:
        ...             raise BlockingIOError
        ...         return self.data.pop()
        >>> s = _BufferedSocket(Six(), lambda: None)
        >>> s.recv(1), s.recv(2), s.leftover(), s.recv(10)
        (b'a', b'bc', 3, b'def')
    """

    __slots__ = ("_buf", "_on_leftover", "_pos", "_sock", "got", "reads", "tls_pending")

    def __init__(self, sock: Any, on_leftover: Callable[[], None]) -> None:
        self._sock = sock
        self._on_leftover = on_leftover
        self._buf = b""
        self._pos = 0
        self.reads = 0  # recv calls made on the socket itself
        self.got = 0  # bytes its last one returned
        # A TLS socket's ``pending`` (decrypted bytes waiting), None for a plain one:
        # looked up once here, as :func:`drain` asks for it after every matched message
        # and a miss through ``__getattr__`` (an AttributeError raised and caught) cost
        # about 1.3 us each time. Under its own name: ``pending`` itself stays the
        # socket's (aiomqtt's reader asks ``hasattr(sock, "pending")`` to tell TLS).
        self.tls_pending: Callable[[], int] | None = getattr(sock, "pending", None)

    def fileno(self) -> int:
        """The socket's file descriptor (for ``select``; spelt out, not ``__getattr__``)."""
        fd: int = self._sock.fileno()
        return fd

    def recv(self, bufsize: int) -> bytes:
        buf, pos = self._buf, self._pos
        if pos < len(buf):
            end = min(pos + bufsize, len(buf))
            self._pos = end
            if end < len(buf):
                self._on_leftover()
            return buf[pos:end]
        self.reads += 1
        data: bytes = self._sock.recv(max(bufsize, _READ_SIZE))
        self.got = len(data)
        if len(data) <= bufsize:
            return data
        self._buf, self._pos = data, bufsize
        self._on_leftover()
        return data[:bufsize]

    def leftover(self) -> int:
        """Bytes read from the socket and not yet taken by ``recv``."""
        return len(self._buf) - self._pos

    def fill(self) -> int:
        """Read up to ``_READ_SIZE`` bytes from the socket into the (empty) buffer.

        Returns how many (0: the peer closed the connection); the socket's errors
        (``BlockingIOError``, TLS "want read"...) are raised as it raises them.
        """
        self.reads += 1
        data: bytes = self._sock.recv(_READ_SIZE)
        self._buf, self._pos = data, 0
        self.got = len(data)
        return len(data)

    def next_packet(self) -> tuple[int, bytes] | None:
        r"""The next whole MQTT packet in the buffer as (first byte, rest), else None.

        The rest is the variable header and payload, after the remaining length (a
        variable byte integer of at most four bytes, MQTT 5.0 section 1.5.5). None,
        taking nothing, when the buffer holds less than one whole packet or the
        remaining length is malformed (paho's reader then reads it as before).

        Example (a PUBACK of packet 1, then the first byte of another packet)::

            >>> s = _BufferedSocket(None, lambda: None)
            >>> s._buf = bytes((0x40, 2, 0, 1, 0x30))
            >>> s.next_packet(), s.next_packet(), s.leftover()
            ((64, b'\x00\x01'), None, 1)
        """
        buf, pos = self._buf, self._pos
        end = len(buf)
        at = pos + 1
        size = 0
        shift = 0
        while True:
            if at >= end or shift > 21:
                return None  # incomplete, or more than four length bytes (malformed)
            byte = buf[at]
            size |= (byte & 0x7F) << shift
            at += 1
            if byte < 0x80:
                break
            shift += 7
        if at + size > end:
            return None
        self._pos = at + size
        return buf[pos], buf[at:at + size]

    def __getattr__(self, name: str) -> Any:
        return getattr(self._sock, name)


#: A receiver's look at a whole PUBLISH before paho's (:func:`buffered_reads`): called with
#: the packet's first byte and the rest (variable header and payload); True when it has
#: taken the packet (paho does not see it), False to leave it to paho.
RawTake = Callable[[int, bytes], bool]


def buffered_reads(client: aiomqtt.Client, *, take: RawTake | None = None) -> None:
    """Read the broker's socket in large pieces, not one system call per packet part.

    paho reads every packet with at least three ``recv`` calls (the first byte, the
    remaining length a byte at a time, then the rest), each a system call: about seven
    per matched fix (its PUBLISH and one or two PUBACKs; ``bench/load.py --cprofile``).
    Here the socket paho opens is wrapped in a :class:`_BufferedSocket` that reads up
    to 64 KiB at a time and hands paho the pieces it asks for. Bytes left in that buffer
    are not seen by the event loop's readiness check, so whenever some are left a
    callback is scheduled in the event loop that lets paho read on (``loop_read``: up
    to one packet per message in flight, as aiomqtt's reader does per readable event),
    again while bytes are left, one turn of the loop at a time. A read error there ends
    the connection as aiomqtt's reader does. Call before connecting, in the event loop.

    With ``take``, every whole PUBLISH packet found in the buffer is first offered to
    it (:data:`RawTake`): a daemon of a worker group takes there, from the raw bytes,
    the fixes it only keeps for another worker's shard, without paho's dispatch, a
    message object or the intake queue (``Daemon._take_raw``). A packet taken is not
    counted against the bound of packets per call: reading it costs about as much as
    finding its end, and the 64 KiB buffer bounds the call.
    """
    paho: Any = client._client
    loop = asyncio.get_running_loop()
    loop_thread = threading.get_ident()
    inner_open = paho.on_socket_open
    state = {"scheduled": False}
    plain_loop_read = paho.loop_read

    def loop_read(max_packets: int = 1) -> MQTTErrorCode:
        sock = paho._sock
        if type(sock) is not _BufferedSocket or paho._in_packet["command"]:
            return plain_loop_read(max_packets)  # not wrapped, or a packet half read
        return _read_packets(paho, sock, plain_loop_read, take)

    def read_on() -> None:
        state["scheduled"] = False
        sock = paho._sock
        if not isinstance(sock, _BufferedSocket) or not sock.leftover():
            return
        try:
            paho.loop_read()
        except Exception as exc:  # as aiomqtt's reader: the connection broke
            disconnected = getattr(client, "_disconnected", None)
            if isinstance(disconnected, asyncio.Future) and not disconnected.done():
                disconnected.set_exception(exc)

    def on_leftover() -> None:
        if not state["scheduled"]:
            state["scheduled"] = True
            if threading.get_ident() == loop_thread:
                loop.call_soon(read_on)
            else:
                loop.call_soon_threadsafe(read_on)

    def on_socket_open(c: Any, userdata: Any, sock: Any) -> None:
        wrapped = _BufferedSocket(sock, on_leftover)
        paho._sock = wrapped
        if inner_open is not None:
            inner_open(c, userdata, wrapped)

    paho.on_socket_open = on_socket_open
    paho.loop_read = loop_read


def _read_packets(paho: Any, sock: _BufferedSocket,
                  plain_loop_read: Callable[[int], MQTTErrorCode],
                  take: RawTake | None = None) -> MQTTErrorCode:
    """Read whole packets from a :class:`_BufferedSocket`'s buffer (paho's ``loop_read``).

    paho reads a packet with three ``recv`` calls at least (the first byte, the
    remaining length a byte at a time, the rest) and then tries once more until the
    socket raises ``BlockingIOError``: a system call and an exception per readable
    event. Here one ``recv`` of up to ``_READ_SIZE`` bytes is made when the buffer is
    empty, and each whole packet in it is handed to paho's ``_packet_handle`` as paho's
    reader does (the same ``_in_packet`` fields, reset afterwards, and the time of the
    last bytes received, which paho's keepalive reads), up to paho's own bound of
    packets per call (one per message in flight), but at least ``_READ_PACKETS_MIN``.
    A packet not yet whole in the buffer is left to paho's reader (which reads the rest
    from the socket).
    What the socket still holds is found by the event loop, which reports it readable
    again; bytes left in the buffer are read on by the scheduled callback of
    :func:`buffered_reads`. Errors end the connection as in paho (``_loop_rc_handle``).
    A PUBLISH that ``take`` takes (see :func:`buffered_reads`) is not handed to paho and
    not counted against that bound.
    Relies on paho-mqtt 2.x internals (``_in_packet``, ``_packet_handle``,
    ``_loop_rc_handle``, ``_msgtime_mutex``); the test compares with paho's reading.
    """
    if not sock.leftover():
        try:
            if not sock.fill():
                return paho._loop_rc_handle(MQTTErrorCode.MQTT_ERR_CONN_LOST)  # closed
        except (BlockingIOError, ssl.SSLWantReadError):
            return MQTTErrorCode.MQTT_ERR_SUCCESS
        except ssl.SSLWantWriteError:
            paho._call_socket_register_write()
            return MQTTErrorCode.MQTT_ERR_SUCCESS
        except OSError as err:
            paho._easy_log(MQTT_LOG_ERR, "failed to receive on socket: %s", err)
            return paho._loop_rc_handle(MQTTErrorCode.MQTT_ERR_CONN_LOST)
    rc = MQTTErrorCode.MQTT_ERR_SUCCESS
    bound = max(_READ_PACKETS_MIN, len(paho._out_messages) + len(paho._in_messages))
    handed = 0
    taken = 0
    while handed < bound:
        whole = sock.next_packet()
        if whole is None:
            if taken:
                with paho._msgtime_mutex:  # paho's keepalive reads it
                    paho._last_bytes_received = time_func()
            if sock.leftover():  # part of a packet: paho reads the rest
                return plain_loop_read(1)
            break
        command, body = whole
        if take is not None and command & 0xF0 == _PUBLISH and take(command, body):
            taken += 1
            continue
        handed += 1
        paho._in_packet = {"command": command, "have_remaining": 1, "remaining_count": [],
                           "remaining_mult": 1, "remaining_length": len(body),
                           "packet": body, "to_process": 0, "pos": 0}
        try:
            rc = paho._packet_handle()
        except MalformedPacket as exc:
            paho._easy_log(MQTT_LOG_DEBUG, "Received malformed packet: %s", exc)
            rc = MQTTErrorCode.MQTT_ERR_PROTOCOL
        paho._in_packet = {"command": 0, "have_remaining": 0, "remaining_count": [],
                           "remaining_mult": 1, "remaining_length": 0,
                           "packet": bytearray(b""), "to_process": 0, "pos": 0}
        with paho._msgtime_mutex:
            paho._last_bytes_received = time_func()
        if rc > 0:
            return paho._loop_rc_handle(rc)
        if paho._sock is not sock:
            return rc  # the handler closed the connection
    if sock.leftover():
        sock._on_leftover()  # the event loop does not see them: read on soon
    return rc


#: Intake key of messages that cannot be a position fix (shed before any fix).
JUNK_KEY = "junk"
#: Intake key of a place held only for an acknowledgement (:meth:`IntakeQueue.put_ack`).
ACK_ONLY_KEY = "ack"


class _Slot:
    """A place in the intake queue: the message, or None once shed (QoS 0).

    ``kept`` and ``shard`` are what the receiver noted on arrival (0 and -1: nothing),
    handed back with the message (:attr:`IntakeQueue.last_kept`).
    """

    __slots__ = ("kept", "key", "message", "shard", "shed")

    def __init__(self, key: str, message: aiomqtt.Message, kept: int = 0,
                 shard: int = -1) -> None:
        self.key = key
        self.message: aiomqtt.Message | None = message
        self.shed = False
        self.kept = kept
        self.shard = shard


class _Slots:
    """Arrival-ordered slots with per-vehicle indexes; ``len`` counts live messages.

    ``asyncio.Queue`` only appends, pops from the left, and asks for the length and
    truthiness of its container, so this stands in for its deque.
    """

    def __init__(self) -> None:
        self.order: deque[_Slot] = deque()
        self.by_key: dict[str, deque[_Slot]] = {}
        self.multi: dict[str, None] = {}  # keys with two or more live messages, oldest first
        self.live = 0  # messages waiting to be matched
        self.markers = 0  # shed QoS 1 messages waiting for their acknowledgement
        self.last_key = ""  # key of the message popped last
        self.last_kept = (0, -1)  # (kept, shard) of the message popped last

    def __len__(self) -> int:
        return self.live + self.markers

    def __bool__(self) -> bool:
        return len(self) > 0

    def append(self, slot: _Slot) -> None:
        self.order.append(slot)
        same = self.by_key.setdefault(slot.key, deque())
        same.append(slot)
        if len(same) == 2:
            self.multi[slot.key] = None
        self.live += 1

    def _unindex_oldest(self, key: str) -> _Slot:
        same = self.by_key[key]
        slot = same.popleft()
        if len(same) == 1:
            self.multi.pop(key, None)
        elif not same:
            del self.by_key[key]
        return slot

    def append_marker(self, slot: _Slot) -> None:
        """Append a place that is only acknowledged (never matched, never shed)."""
        slot.shed = True
        self.order.append(slot)
        self.markers += 1

    def popleft(self) -> aiomqtt.Message:
        while True:
            slot = self.order.popleft()
            self.last_key = slot.key
            self.last_kept = (slot.kept, slot.shard)
            if slot.shed:
                if slot.message is None:
                    continue  # a shed QoS 0 message: nothing left to do
                self.markers -= 1
                return slot.message
            self._unindex_oldest(slot.key)
            self.live -= 1
            assert slot.message is not None
            return slot.message

    def shed_one(self, key: str) -> aiomqtt.Message:
        """Shed one live message and return it.

        The oldest junk message (:data:`JUNK_KEY`) if any, else the oldest of ``key`` if
        it has two, else of another vehicle with two, else the oldest live message.
        """
        if self.by_key.get(JUNK_KEY):
            key = JUNK_KEY
        elif len(self.by_key.get(key, ())) < 2:
            key = next(iter(self.multi), "")
        if not key:
            key = next(s.key for s in self.order if not s.shed)
        slot = self._unindex_oldest(key)
        slot.shed = True
        self.live -= 1
        message = slot.message
        assert message is not None
        if message.qos > 0:
            self.markers += 1
        else:
            slot.message = None
        if len(self.order) > 2 * (self.live + self.markers) + 64:  # drop dead slots
            self.order = deque(s for s in self.order if not s.shed or s.message is not None)
        return message


class IntakeQueue(asyncio.Queue[aiomqtt.Message]):
    """aiomqtt's incoming queue with a bound that sheds old fixes, never the newest.

    Args:
        limit: most messages waiting to be matched (``mqtt.intake_max``).
        key_of: (topic, payload) -> the vehicle the message is about (the key that
            decides which messages may replace one another).
        on_shed: called with each message shed (for counting), when it is shed.

    When a message arrives and ``limit`` are already waiting, one waiting message is
    shed: the oldest message keyed :data:`JUNK_KEY` (one that cannot be a fix and would
    only be rejected), else the oldest of the same vehicle when that vehicle has another
    one waiting, else the oldest of some vehicle that has two or more waiting, else
    (more distinct vehicles waiting than ``limit``) the oldest message. A shed QoS 0
    message vanishes; a shed QoS 1 message keeps its place as a marker (its payload
    released) that the receive loop acknowledges without matching (:meth:`was_shed`),
    so acknowledgements stay in arrival order. Markers are bounded by the broker's
    in-flight window (the Receive Maximum, where the broker honours it).

    Example:
        >>> q = IntakeQueue(2, key_of=lambda topic, payload: topic)
        >>> def m(topic, mid):
        ...     return aiomqtt.Message(topic, b"x", 0, False, mid, None)
        >>> for i, topic in enumerate(["a", "b", "a", "a"]):
        ...     q.put_nowait(m(topic, i))
        >>> [(x.topic.value, x.mid) for x in (q.get_nowait(), q.get_nowait())]
        [('b', 1), ('a', 3)]
        >>> q.shed_total, q.qsize()
        (2, 0)
    """

    def __init__(self, limit: int, *, key_of: Callable[[str, bytes], str],
                 on_shed: Callable[[aiomqtt.Message], None] | None = None) -> None:
        super().__init__()
        self.limit = limit
        self.key_of = key_of
        self.on_shed = on_shed
        self.shed_total = 0
        self.peak = 0
        self._shed_ids: set[int] = set()
        self._waiter: asyncio.Future[None] | None = None
        self._interrupted = False
        self._given: tuple[str, int, int] | None = None  # put_keyed's key, kept, shard
        # When set, every message put (put_nowait: aiomqtt's own on_message callback and
        # lean_receive's deliver alike) goes to it instead; it queues with put_keyed.
        self.arrive: Callable[[aiomqtt.Message], None] | None = None

    def _init(self, maxsize: int) -> None:
        self._queue = _Slots()

    def _put(self, item: aiomqtt.Message) -> None:
        slots: _Slots = self._queue
        # paho builds an MQTT v5 Properties object for every message (two dicts of all
        # property names and types, a few KiB); nothing reads them here, and a backlog of
        # 100,000 waiting messages would otherwise hold hundreds of MiB.
        item.properties = None
        given = self._given
        if given is not None:
            self._given = None
            key, kept, shard = given
        else:
            payload = item.payload if isinstance(item.payload, bytes | bytearray) else b""
            key, kept, shard = self.key_of(item.topic.value, bytes(payload)), 0, -1
        slots.append(_Slot(key, item, kept, shard))
        if slots.live > self.limit:
            shed = slots.shed_one(key)
            self.shed_total += 1
            if shed.qos > 0:
                self._shed_ids.add(id(shed))
                shed.payload = b""
            if self.on_shed is not None:
                self.on_shed(shed)
        self.peak = max(self.peak, slots.live)

    def _get(self) -> aiomqtt.Message:
        slots: _Slots = self._queue
        return slots.popleft()

    @property
    def last_key(self) -> str:
        """The key (``key_of``) of the message taken last, "" before the first.

        The receive loop reads it instead of computing the key again: for a message
        keyed :data:`JUNK_KEY` the payload was found not to be a fix when it arrived.
        """
        slots: _Slots = self._queue
        return slots.last_key

    @property
    def last_kept(self) -> tuple[int, int]:
        """(kept, shard) given to :meth:`put_keyed` for the message taken last, else (0, -1)."""
        slots: _Slots = self._queue
        return slots.last_kept

    def put_nowait(self, item: aiomqtt.Message) -> None:
        """Queue ``item`` (shedding an older one when full) and wake :meth:`wait`.

        With :attr:`arrive` set, hand ``item`` to it instead (it queues what it does
        not finish with :meth:`put_keyed` or :meth:`put_ack`).
        """
        if self.arrive is not None and self._given is None:
            self.arrive(item)
            return
        super().put_nowait(item)
        self._wake()

    def put_keyed(self, item: aiomqtt.Message, key: str, kept: int = 0,
                  shard: int = -1) -> None:
        """:meth:`put_nowait` with the key already known (``key_of`` is not called).

        ``kept`` and ``shard`` are handed back by :attr:`last_kept` when the message is
        taken (the daemon: the message's place in a shard's buffer, kept on arrival).

        Example:
            >>> q = IntakeQueue(2, key_of=lambda topic, payload: 1 / 0)  # never called
            >>> q.put_keyed(aiomqtt.Message("a", b"x", 1, False, 7, None), "v:a", 5, 3)
            >>> q.get_nowait().mid, q.last_key, q.last_kept
            (7, 'v:a', (5, 3))
        """
        self._given = (key, kept, shard)
        try:
            self.put_nowait(item)
        finally:
            self._given = None

    def put_ack(self, item: aiomqtt.Message) -> None:
        """Queue a place that is only to be acknowledged, keyed :data:`ACK_ONLY_KEY`.

        For a message handled on arrival but whose PUBACK must wait for the messages
        ahead of it (MQTT 5.0 section 4.6: PUBACKs in the order the PUBLISH packets
        arrived). It is never shed and not counted by :attr:`waiting`; its payload is
        dropped.

        Example:
            >>> q = IntakeQueue(1, key_of=lambda topic, payload: topic)
            >>> q.put_nowait(aiomqtt.Message("a", b"x", 1, False, 1, None))
            >>> q.put_ack(aiomqtt.Message("b", b"y", 1, False, 2, None))
            >>> q.waiting, q.qsize()
            (1, 2)
            >>> [(q.get_nowait().mid, q.last_key) for _ in range(2)]
            [(1, 'a'), (2, 'ack')]
        """
        item.properties = None
        item.payload = b""
        slots: _Slots = self._queue
        slots.append_marker(_Slot(ACK_ONLY_KEY, item))
        self._wake()

    def interrupt(self, _done: object = None) -> None:
        """End the current and every later :meth:`wait` (stopping or disconnected).

        Usable as a done-callback of a future (the argument is ignored).
        """
        self._interrupted = True
        self._wake()

    def _wake(self) -> None:
        waiter = self._waiter
        if waiter is not None and not waiter.done():
            waiter.set_result(None)

    async def wait(self) -> None:
        """Return once a message waits or :meth:`interrupt` was called.

        One future per wait, no task: the receive loop used aiomqtt's message iterator
        (a task for the queue's get plus an ``asyncio.wait`` per message, inside a second
        task and wait of its own to race the stop signal), which cost more than relaying
        the message (``bench/load.py --cpu-per-fix``).

        Example:
            >>> async def demo():
            ...     q = IntakeQueue(2, key_of=lambda topic, payload: topic)
            ...     asyncio.get_running_loop().call_soon(q.interrupt)
            ...     await q.wait()              # nothing came: returns when interrupted
            ...     return q.empty()
            >>> asyncio.run(demo())
            True
        """
        while self.empty() and not self._interrupted:
            waiter = asyncio.get_running_loop().create_future()
            self._waiter = waiter
            try:
                await waiter
            finally:
                self._waiter = None

    @property
    def waiting(self) -> int:
        """Messages waiting to be matched (shed markers not counted)."""
        slots: _Slots = self._queue
        return slots.live

    def was_shed(self, message: aiomqtt.Message) -> bool:
        """Whether ``message`` (just taken from the queue) was shed: acknowledge only."""
        if id(message) in self._shed_ids:
            self._shed_ids.discard(id(message))
            return True
        return False


async def until_answered(client: aiomqtt.Client, request: Awaitable[T]) -> T:
    """Await a request to the broker (subscribe...) without a time limit, until disconnected.

    After a reconnection the broker first sends what it queued for the persistent
    session (up to the Receive Maximum, tens of thousands of messages under a flood)
    and its SUBACK comes after them: a fixed timeout (aiomqtt's default is 10 s) ended
    the session, which redelivered the whole backlog, whose reading outlasted the next
    timeout, and so on forever (measured in the fault suite's 100,000-message run).
    aiomqtt does not fail a pending request when the connection drops, so the wait
    races the connection's end, which raises :class:`aiomqtt.MqttError`.
    """
    task = asyncio.ensure_future(request)
    closed = getattr(client, "_disconnected", None)
    if not isinstance(closed, asyncio.Future):
        return await task
    try:
        await asyncio.wait({task, closed}, return_when=asyncio.FIRST_COMPLETED)
    except asyncio.CancelledError:
        task.cancel()
        raise
    if task.done():
        return task.result()
    task.cancel()
    raise aiomqtt.MqttError("Disconnected while waiting for the broker's answer")


def write_soon(client: aiomqtt.Client) -> None:
    """Send queued packets once per turn of the event loop, without a wake-up syscall.

    aiomqtt tells paho to ask for the socket's writability by
    ``loop.call_soon_threadsafe(loop.add_writer, ...)`` for every packet queued: a write
    to the event loop's self-pipe, a read of it, a change of the epoll set and a further
    turn of the loop per PUBACK or PUBLISH. Here a packet queued from the event loop's
    own thread schedules one ``loop_write`` (which sends every packet queued by then)
    with ``call_soon``; only when the socket's send buffer is full (paho still wants to
    write afterwards) is aiomqtt's writer callback registered, as before. Packets queued
    from another thread (paho's connect runs in an executor) take aiomqtt's way.
    Must be called in the event loop's thread, before connecting.
    """
    paho = client._client
    loop = asyncio.get_running_loop()
    loop_thread = threading.get_ident()
    plain_register = paho.on_socket_register_write
    plain_unregister = paho.on_socket_unregister_write
    state = {"writer": False}

    def wait_writable() -> None:
        state["writer"] = True
        sock = paho.socket()
        if plain_register is not None and sock is not None:
            plain_register(paho, None, sock)

    def flush() -> None:
        coalesce(paho)
        try:
            paho.loop_write()
        except Exception as exc:  # as aiomqtt's writer callback: the connection broke
            disconnected = getattr(client, "_disconnected", None)
            if isinstance(disconnected, asyncio.Future) and not disconnected.done():
                disconnected.set_exception(exc)
            return
        # paho keeps its "write registered" flag while packets are left (send buffer
        # full), so it will not ask again: wait for writability the aiomqtt way.
        if paho.want_write() and not state["writer"]:
            wait_writable()

    def register(c: Any, userdata: Any, sock: Any) -> None:
        # paho calls this once until its queue is empty again (it keeps a flag)
        if threading.get_ident() != loop_thread:
            wait_writable()
        else:
            loop.call_soon(flush)

    def unregister(c: Any, userdata: Any, sock: Any) -> None:
        if state["writer"]:
            state["writer"] = False
            if plain_unregister is not None:
                plain_unregister(c, userdata, sock)

    paho.on_socket_register_write = register
    paho.on_socket_unregister_write = unregister


_PUBLISH = 0x30  # MQTT control packet types (MQTT 5.0 section 2.1.2), high nibble
_DISCONNECT = 0xE0
# Largest joined write (bytes): paho resends a partly written packet from a copy of its
# rest, so one huge packet behind a full socket would be copied again on every write.
_JOIN_MAX = 64 * 1024


def coalesce(paho: Any) -> int:
    """Join the packets paho has queued into one, so that one ``send`` carries them all.

    paho writes every queued packet with a ``send`` of its own: a PUBACK and one or two
    PUBLISHes per fix, each a system call that wakes the broker. Joined, they go out
    as one write (the socket has TCP_NODELAY, so as one segment). A queued packet's
    entry is only read again after its last byte is written, and only for a QoS 0
    PUBLISH (its delivery callback) or a DISCONNECT (closing the socket): when either is
    queued, or a packet is already partly written, nothing is joined. Joined writes are
    at most ``_JOIN_MAX`` bytes (a larger packet stays as it is). Returns how many
    packets the joined writes carry (0: nothing was joined). Relies on paho-mqtt 2.x's
    queue of ``_OutPacket`` dicts; with any other layout it joins nothing.

    Example:
        >>> class FakePaho:
        ...     def __init__(self, packets):
        ...         self._out_packet = deque({"command": c, "mid": 0, "qos": q, "pos": 0,
        ...             "to_process": len(b), "packet": b, "info": None} for c, q, b in packets)
        >>> p = FakePaho([(0x40, 0, b"ack"), (0x32, 1, b"pub")])
        >>> coalesce(p), [x["packet"] for x in p._out_packet]
        (2, [b'ackpub'])
        >>> p = FakePaho([(0x40, 0, b"ack"), (0x30, 0, b"qos0")])  # QoS 0: left alone
        >>> coalesce(p), len(p._out_packet)
        (0, 2)
    """
    queue = getattr(paho, "_out_packet", None)
    if not isinstance(queue, deque) or len(queue) < 2:
        return 0
    chunks: list[list[bytes]] = [[]]
    size = 0
    try:
        for packet in queue:
            kind = packet["command"] & 0xF0
            if (packet["pos"] != 0 or kind == _DISCONNECT
                    or (kind == _PUBLISH and packet["qos"] == 0)):
                return 0
            data = packet["packet"]
            if size + len(data) > _JOIN_MAX and chunks[-1]:
                chunks.append([])
                size = 0
            chunks[-1].append(data)
            size += len(data)
    except (KeyError, TypeError):
        return 0
    if len(chunks) == len(queue):
        return 0  # nothing to join
    queue.clear()
    for parts in chunks:
        data = b"".join(parts)
        # command 0 is reserved in MQTT: paho does nothing for it once it is written
        queue.append({"command": 0, "mid": 0, "qos": 0, "pos": 0, "to_process": len(data),
                      "packet": data, "info": None})
    return sum(len(parts) for parts in chunks)


def publish_now(client: aiomqtt.Client, topic: str, payload: bytes, *, qos: int,
                retain: bool) -> Any:
    """Hand one message to paho now; return its message info (``is_published()``).

    aiomqtt's ``publish`` is a coroutine that needs a task per message to keep several in
    flight, plus an event and a wait per message; the daemon follows its window by
    polling the infos in order instead, woken by :func:`on_acknowledged`. Raises
    :class:`aiomqtt.MqttCodeError` when paho refuses the message, as aiomqtt does.

    The daemon's usual case, a QoS 1 message with a topic name, bytes payload and no
    properties on a connected MQTT 5 session with room in the in-flight window, is
    queued by :func:`_publish_lean` (the same packet and the same entry in paho's
    session state, without paho's per-message lock and logging); anything else goes
    through paho's ``publish``.
    """
    paho = client._client
    info: Any = _publish_lean(paho, topic, payload, retain) if qos == 1 else None
    if info is None:
        info = paho.publish(topic, payload, qos, retain)
    if info.rc != 0:  # paho's MQTT_ERR_SUCCESS
        raise aiomqtt.MqttCodeError(info.rc, "Could not publish message")
    return info


class _Sent:
    """The info of a message queued by :func:`_publish_lean`.

    It has what paho and the daemon use of ``MQTTMessageInfo``: ``mid``, ``rc``,
    ``is_published()`` and paho's ``_set_as_published()`` (called when the PUBACK is
    read), without the ``threading.Condition`` paho builds for every message (about a
    tenth of a publish): everything here runs in the event loop's thread.
    """

    __slots__ = ("_published", "mid", "rc")

    def __init__(self, mid: int) -> None:
        self.mid = mid
        self.rc = MQTTErrorCode.MQTT_ERR_SUCCESS
        self._published = False

    def _set_as_published(self) -> None:
        self._published = True

    def is_published(self) -> bool:
        return self._published


_PUBLISH_QOS1 = _PUBLISH | 0x02  # first byte of a QoS 1 PUBLISH (MQTT 5.0 section 3.3.1)


def _publish_lean(paho: Any, topic: str, payload: bytes, retain: bool) -> _Sent | None:
    """Queue a QoS 1 PUBLISH as paho's ``publish`` would; None: leave it to paho.

    The packet is MQTT 5.0 section 3.3: the first byte (QoS 1, RETAIN), the remaining
    length (variable byte integer, section 1.5.5), the topic name (two-byte length and
    UTF-8), the packet identifier, a property length of 0, the payload; the message is
    entered in paho's ``_out_messages`` waiting for its PUBACK and counted in flight,
    as paho does, then queued with paho's ``_packet_queue`` (which arranges the write).
    None (paho decides, as before) when the session is not MQTT 5, not connected, has
    no room in flight or a queue limit, or the topic or payload is unusual (wildcards,
    empty, not bytes, too long). Relies on paho-mqtt 2.x internals; the test compares
    its packets with paho's own.

    Example (a degenerate case: not connected, so paho decides)::

        >>> import paho.mqtt.client as paho_client
        >>> c = paho_client.Client(paho_client.CallbackAPIVersion.VERSION2,
        ...                        protocol=paho_client.MQTTv5)
        >>> _publish_lean(c, "a/b", b"{}", False) is None
        True
    """
    if (paho._sock is None or paho._protocol != 5 or type(payload) is not bytes
            or paho._max_queued_messages > 0
            or 0 < paho._max_inflight_messages <= paho._inflight_messages):
        return None
    name = topic.encode("utf-8")
    size = len(name) + len(payload) + 5  # topic length 2, packet id 2, property length 1
    if (not name or len(name) > 65_535 or size > 268_435_455
            or b"+" in name or b"#" in name or b"\x00" in name):
        return None
    mid = paho._mid_generate()
    if mid in paho._out_messages:
        return None  # paho reports it (MQTT_ERR_QUEUE_SIZE)
    length = bytearray()
    while True:  # variable byte integer: 7 bits a byte, least significant first
        digit, size = size & 0x7F, size >> 7
        length.append(digit | 0x80 if size else digit)
        if not size:
            break
    packet = b"".join((bytes((_PUBLISH_QOS1 | retain,)), length,
                       len(name).to_bytes(2, "big"), name, mid.to_bytes(2, "big"), b"\x00",
                       payload))
    info = _Sent(mid)
    message = MQTTMessage.__new__(MQTTMessage)  # the fields paho's publish sets
    message.timestamp = time.monotonic()
    message.state = mqtt_ms_wait_for_puback
    message.dup = False
    message.mid = mid
    message._topic = name
    message.payload = payload
    message.qos = 1
    message.retain = retain
    message.info = info  # type: ignore[assignment]  # duck-typed MQTTMessageInfo
    message.properties = None
    with paho._out_message_mutex:
        paho._out_messages[mid] = message
        paho._inflight_messages += 1
    paho._packet_queue(_PUBLISH, packet, mid, 1, info)
    return info


@dataclasses.dataclass(frozen=True)
class ReceivedTopic(aiomqtt.Topic):
    """The topic name of a received PUBLISH, taken as the broker sent it.

    aiomqtt checks every topic it wraps (not empty, no ``+`` or ``#``, at most 65,535
    bytes); a topic name the broker delivers already holds to that (MQTT 5.0 section
    4.7.3: the server refuses a PUBLISH whose topic name has a wildcard; the length is
    a two-byte integer), so the check is left out here. Everything else is aiomqtt's
    ``Topic`` (``value``, ``matches``).

    Example (no check, as the broker already made it)::

        >>> ReceivedTopic("fleet/bus-17/position").matches("fleet/+/position")
        True
    """

    def __post_init__(self) -> None:
        return None


def lean_receive(client: aiomqtt.Client, *,
                 deliver: Callable[[aiomqtt.Message], None] | None = None) -> None:
    """Decode the common incoming PUBLISH and PUBACK without paho's MQTT 5 objects.

    With MQTT 5 paho builds a ``Properties`` object for every PUBLISH it reads (two
    dictionaries of every property name and type; ``decode_publish`` took about 6x as
    long as for the same packet in MQTT 3.1.1) and a ``ReasonCode`` and a ``Properties``
    for every PUBACK, though nothing here reads them (the intake queue drops them). A
    QoS 0 or 1 PUBLISH with a topic name and no properties (a zero property length) is
    decoded here into the same ``MQTTMessage`` (``properties`` None) and handed to
    the ``on_message`` callback as paho's ``_handle_on_message`` would (paho's own
    dispatch when topic callbacks are registered); a PUBACK of two bytes (success, no
    reason code or properties, MQTT 5.0 section 3.4.2.1), or of three or four with a
    reason code below 0x80 and no properties (mosquitto answers 0x10 "No matching
    subscribers" to every publish on a topic nobody reads, a quarter of the daemon's
    outputs in ``bench/load.py``), goes to paho's ``on_publish`` dispatch with one
    shared ``ReasonCode`` per code and shared empty properties. Anything else (a
    failure code, properties) takes paho's way. Relies on
    paho-mqtt 2.x internals (``_in_packet``, ``_handle_publish``,
    ``_handle_pubackcomp``, ``_do_on_publish``); the test compares with paho's decoding.
    Call before connecting.

    With ``deliver`` (the daemon passes its :class:`IntakeQueue`'s ``put_nowait``) such
    a PUBLISH becomes the ``aiomqtt.Message`` aiomqtt's ``on_message`` callback would
    make (``properties`` None, its topic a :class:`ReceivedTopic`) and is handed to
    ``deliver`` directly: no paho message, callback lock or aiomqtt callback in
    between, and no check of the topic. A topic name that is not UTF-8 takes paho's
    way (which fails as before). Without ``deliver`` it goes to ``on_message``.
    """
    paho: Any = client._client
    plain_publish = paho._handle_publish
    plain_puback = paho._handle_pubackcomp
    reasons = {0: ReasonCode(PacketTypes.PUBACK)}  # "Success"; others added when seen
    no_properties = Properties(PacketTypes.PUBACK)

    def guarded(callback: Callable[..., object], *args: object) -> None:
        """Call a message callback as paho's dispatch of ``on_message`` does.

        An exception is logged and swallowed, or re-raised unless paho suppresses them.
        """
        try:
            callback(*args)
        except Exception as err:
            paho._easy_log(MQTT_LOG_ERR, "Caught exception in on_message: %s", err)
            if not paho.suppress_exceptions:
                raise

    def handle_publish() -> Any:
        header = paho._in_packet["command"]
        packet = paho._in_packet["packet"]
        qos = (header & 0x06) >> 1
        size = len(packet)
        if qos > 1 or size < 3:
            return plain_publish()
        start = 2 + ((packet[0] << 8) | packet[1])  # after the topic name
        mid = 0
        if qos:
            if size < start + 2:
                return plain_publish()
            mid = (packet[start] << 8) | packet[start + 1]
            start += 2
        if start == 2 or size <= start or packet[start] != 0:
            return plain_publish()  # no topic name (an alias), or properties
        if deliver is not None and not paho._on_message_filtered._root._children:
            try:
                topic = packet[2:start - (2 if qos else 0)].decode("utf-8")
            except UnicodeDecodeError:
                return plain_publish()  # paho's way: its topic property raises
            received = aiomqtt.Message(ReceivedTopic(topic), bytes(packet[start + 1:]), qos,
                                       bool(header & 0x01), mid, None)
            guarded(deliver, received)
        else:
            # MQTTMessage's own __init__ also builds an MQTTMessageInfo (with a lock) that
            # nothing reads for a received message: set the fields it would set instead.
            message = MQTTMessage.__new__(MQTTMessage)
            message.mid = mid
            message._topic = bytes(packet[2:start - (2 if qos else 0)])
            message.state = mqtt_ms_invalid
            message.info = None  # type: ignore[assignment]  # only read for sent messages
            message.dup = bool(header & 0x08)
            message.qos = qos
            message.retain = bool(header & 0x01)
            message.properties = None
            message.payload = bytes(packet[start + 1:])
            message.timestamp = time.monotonic()
            on_message = paho.on_message
            if paho._on_message_filtered._root._children or on_message is None:
                paho._handle_on_message(message)  # topic callbacks: paho dispatches
            else:  # what paho's dispatch comes to without topic callbacks
                with paho._in_callback_mutex:
                    guarded(on_message, paho, paho._userdata, message)
        if qos and not paho._manual_ack:
            return paho._send_puback(mid)
        return MQTTErrorCode.MQTT_ERR_SUCCESS

    def handle_puback(cmd: str) -> Any:
        packet = paho._in_packet["packet"]
        size = len(packet)
        if cmd != "PUBACK" or not 2 <= size <= 4:
            return plain_puback(cmd)
        code = packet[2] if size > 2 else 0
        reason = reasons.get(code)
        if reason is None:
            if code >= 0x80:  # a failure (MQTT 5.0 section 3.4.2.1): paho's way
                return plain_puback(cmd)
            try:
                reason = reasons[code] = ReasonCode(PacketTypes.PUBACK, identifier=code)
            except (KeyError, ValueError):  # not a PUBACK reason code
                return plain_puback(cmd)
        if size == 4 and packet[3] != 0:
            return plain_puback(cmd)  # properties
        mid = (packet[0] << 8) | packet[1]
        with paho._out_message_mutex:
            out = paho._out_messages
            if mid not in out:
                return MQTTErrorCode.MQTT_ERR_SUCCESS
            if (len(out) > paho._inflight_messages
                    or paho._callback_api_version is not CallbackAPIVersion.VERSION2):
                # messages wait for room in flight: paho sends the next ones
                return paho._do_on_publish(mid, reason, no_properties)
            # paho's _do_on_publish, less its scan of every message for queued ones to
            # send (none here: every message held is in flight)
            on_publish = paho.on_publish
            if on_publish is not None:
                with paho._in_callback_mutex:
                    try:
                        on_publish(paho, paho._userdata, mid, reason, no_properties)
                    except Exception as err:
                        paho._easy_log(MQTT_LOG_ERR, "Caught exception in on_publish: %s", err)
                        if not paho.suppress_exceptions:
                            raise
            message = out.pop(mid)
            message.info._set_as_published()
            if message.qos > 0:
                paho._inflight_messages -= 1
        return MQTTErrorCode.MQTT_ERR_SUCCESS

    paho._handle_publish = handle_publish
    paho._handle_pubackcomp = handle_puback


def cap_inflight(client: aiomqtt.Client, most: int) -> None:
    """Keep up to ``most`` QoS 1/2 publishes in flight, fewer if the broker says so.

    paho sends at most 20 by default and does not read the broker's Receive Maximum
    from the CONNACK (MQTT 5.0 section 3.2.2.3.3; absent means 65,535), and sending more
    than it is a protocol error that ends the connection (section 4.9). So until the
    CONNACK the bound is ``min(most, 20)``, then ``min(most, Receive Maximum)``. Under a
    flood the broker's PUBACKs queue behind the messages it sends us, so outputs per
    second are about the bound divided by that delay. Call before connecting.

    Example::

        cap_inflight(client, 100)   # mosquitto with max_inflight_messages 100: 100
    """
    paho = client._client
    paho.max_inflight_messages_set(max(1, min(most, 20)))
    inner: Any = paho.on_connect

    def on_connect(c: Any, userdata: Any, flags: Any, reason_code: Any,
                   properties: Any = None, *rest: Any) -> None:
        limit = 65_535
        if properties is not None:
            with contextlib.suppress(AttributeError):  # paho: absent property
                limit = int(properties.ReceiveMaximum)
        # paho's setter refuses once connected; its CONNACK handler calls this before
        # it sends anything queued, so the attribute behind the setter is safe to set.
        paho._max_inflight_messages = max(1, min(most, limit))
        if inner is not None:
            inner(c, userdata, flags, reason_code, properties, *rest)

    paho.on_connect = on_connect


def on_acknowledged(client: aiomqtt.Client, callback: Callable[[int], None]) -> None:
    """Call ``callback(mid)`` (in the event loop) on every PUBACK, besides aiomqtt's own.

    paho calls it just before it marks the message's info as published, so inside the
    callback ``is_published()`` of that message (the packet identifier ``mid``) is
    still False; of every message acknowledged before it, True.

    aiomqtt's own ``on_publish`` wakes the ``publish`` call waiting for that message:
    it looks the message up in its table of pending publishes, and for a message sent
    by :func:`publish_now` (never in it) raises and swallows a ``KeyError`` (about a
    hundredth of the daemon's CPU). So it is called only for messages in that table,
    or for every message when the table is not found where aiomqtt 2.x keeps it
    (``_pending_publishes``); the test publishes both ways through a broker.
    """
    paho = client._client
    inner = paho.on_publish
    pending = getattr(client, "_pending_publishes", None)
    if not isinstance(pending, dict):
        pending = None

    def on_publish(*args: Any) -> None:
        if inner is not None and (pending is None or args[2] in pending):
            inner(*args)
        callback(args[2])

    paho.on_publish = on_publish


_PUBACK = 0x40


def ack(client: aiomqtt.Client, message: aiomqtt.Message) -> None:
    """PUBACK ``message`` now (QoS 0 messages need none).

    A QoS 1 message's PUBACK (MQTT 5.0 section 3.4: packet type, remaining length 2, the
    packet identifier; success needs no reason code) is queued with paho's
    ``_packet_queue``, as paho's ``ack`` does but without its branches and logging;
    QoS 2 takes paho's way.
    """
    if message.qos == 1:
        ack_mid(client, message.mid)
    elif message.qos > 1:
        client._client.ack(message.mid, message.qos)


def ack_mid(client: aiomqtt.Client, mid: int) -> None:
    """PUBACK the QoS 1 message with packet identifier ``mid`` now (see :func:`ack`)."""
    paho = client._client
    if paho._manual_ack:
        paho._packet_queue(_PUBACK, bytes((_PUBACK, 2, mid >> 8, mid & 0xFF)), mid, 1)


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
