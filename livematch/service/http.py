"""A tiny asyncio HTTP server for ``/metrics``, ``/healthz`` and ``/readyz``.

It speaks just enough HTTP/1.1 for Prometheus and for orchestrators' probes: GET (and
HEAD) of three paths, one request per connection, ``Connection: close``. Anything else
gets 404 or 405. It runs in the daemon's own event loop, so it needs no thread and
reads the daemon's state directly.

- ``/metrics``: the daemon's registry in the Prometheus text format.
- ``/healthz``: 200 while the process is alive and its event loop answers.
- ``/readyz``: 200 when the daemon is subscribed at the broker (connected, every
  SUBACK in) and the state store is connected, 503 otherwise (the body names what is
  missing).

``livematch run`` starts it before it loads the road network and compiles the matcher's
kernels (tens of seconds on a cold numba cache), so ``/healthz`` answers during that
time and ``/readyz`` says ``not ready: compiling``; the daemon then takes it over
(:meth:`HealthServer.serve`).
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
from collections.abc import Callable

from prometheus_client import CONTENT_TYPE_LATEST

log = logging.getLogger("livematch.http")

_REASONS = {200: "OK", 400: "Bad Request", 404: "Not Found", 405: "Method Not Allowed",
            503: "Service Unavailable"}
# A request line and headers longer than this are refused (probes send a few hundred).
_MAX_HEAD_BYTES = 8192


class HealthServer:
    """Serves the three endpoints on ``host:port``.

    Args:
        host, port: where to listen (port 0 picks a free port; see :attr:`port`).
        render_metrics: returns the exposition bytes.
        readiness: returns the list of things not ready (empty when ready).
    """

    def __init__(self, host: str, port: int, *, render_metrics: Callable[[], bytes],
                 readiness: Callable[[], list[str]]) -> None:
        self.host = host
        self.port = port
        self._render_metrics = render_metrics
        self._readiness = readiness
        self._server: asyncio.Server | None = None

    async def start(self) -> None:
        """Bind and start accepting; :attr:`port` is the bound port afterwards."""
        self._server = await asyncio.start_server(self._handle, self.host, self.port)
        self.port = self._server.sockets[0].getsockname()[1]

    async def close(self) -> None:
        """Stop accepting and close the listener."""
        if self._server is not None:
            self._server.close()
            await self._server.wait_closed()
            self._server = None

    def serve(self, *, render_metrics: Callable[[], bytes],
              readiness: Callable[[], list[str]]) -> None:
        """Answer from now on with these callables (the daemon takes over a started server).

        Example::

            http = HealthServer("127.0.0.1", 0, render_metrics=lambda: b"",
                                readiness=lambda: ["compiling"])
            await http.start()                  # /readyz: 503 "not ready: compiling"
            http.serve(render_metrics=daemon_metrics, readiness=lambda: [])  # 200 "ready"
        """
        self._render_metrics = render_metrics
        self._readiness = readiness

    async def _handle(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            try:
                head = await asyncio.wait_for(reader.readuntil(b"\r\n\r\n"), timeout=5.0)
            except (asyncio.IncompleteReadError, asyncio.LimitOverrunError, TimeoutError):
                await self._reply(writer, 400, b"bad request\n")
                return
            if len(head) > _MAX_HEAD_BYTES:
                await self._reply(writer, 400, b"request too large\n")
                return
            parts = head.split(b"\r\n", 1)[0].split()
            if len(parts) != 3:
                await self._reply(writer, 400, b"bad request line\n")
                return
            method, target = parts[0], parts[1].split(b"?", 1)[0]
            if method not in (b"GET", b"HEAD"):
                await self._reply(writer, 405, b"only GET and HEAD\n", head_only=False)
                return
            status, ctype, body = self._route(target)
            await self._reply(writer, status, body, ctype=ctype, head_only=method == b"HEAD")
        except (ConnectionError, OSError) as exc:
            log.debug("http client went away: %s", exc)
        finally:
            writer.close()
            with contextlib.suppress(ConnectionError, OSError):
                await writer.wait_closed()

    def _route(self, target: bytes) -> tuple[int, str, bytes]:
        if target == b"/metrics":
            return 200, CONTENT_TYPE_LATEST, self._render_metrics()
        if target == b"/healthz":
            return 200, "text/plain; charset=utf-8", b"ok\n"
        if target == b"/readyz":
            missing = self._readiness()
            if missing:
                text = "not ready: " + ", ".join(missing) + "\n"
                return 503, "text/plain; charset=utf-8", text.encode()
            return 200, "text/plain; charset=utf-8", b"ready\n"
        return 404, "text/plain; charset=utf-8", b"not found\n"

    @staticmethod
    async def _reply(writer: asyncio.StreamWriter, status: int, body: bytes, *,
                     ctype: str = "text/plain; charset=utf-8", head_only: bool = False) -> None:
        head = (f"HTTP/1.1 {status} {_REASONS[status]}\r\n"
                f"Content-Type: {ctype}\r\n"
                f"Content-Length: {len(body)}\r\n"
                "Connection: close\r\n\r\n").encode("ascii")
        writer.write(head if head_only else head + body)
        await writer.drain()
