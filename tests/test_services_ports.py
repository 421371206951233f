"""The test harness's own port picker: listeners' ports that never collide in one process."""

from __future__ import annotations

import socket

from services import _ephemeral_range, free_port


def test_free_port_never_hands_out_a_port_twice_and_stays_outside_the_ephemeral_range() -> None:
    """Two workers' metrics ports are drawn before either binds, so a repeat would make
    the second fail with "address already in use" (it happened once in CI): every port
    differs from every other handed out, each can be bound, and none lies in the kernel's
    range for outgoing connections (``/proc/sys/net/ipv4/ip_local_port_range``)."""
    low, high = _ephemeral_range()
    ports = [free_port() for _ in range(300)]
    assert len(set(ports)) == len(ports)
    assert all(not low <= p <= high for p in ports)
    for port in ports[:20]:
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            s.bind(("127.0.0.1", port))
