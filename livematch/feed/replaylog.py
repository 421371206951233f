r"""Replay logs: recorded feed messages, one JSON object per line (DESIGN §7).

Each line is one received message::

    {"at": 1764576005.25, "topic": "fleet/bus17/position", "payload": {"time": ...}}

``at`` is the receive time (epoch seconds), ``topic`` the MQTT topic, and ``payload`` the
message: embedded verbatim when it was a one-line JSON object, else as a string holding
the original text (bytes that are not UTF-8 as ``\udcXX`` escapes, Python's
``surrogateescape``). Either way the reader hands back exactly the bytes that were
received, so a replay sees what the daemon saw: the same size, the same broken JSON,
the same verdict. A name ending in ``.gz`` means gzip. Blank lines are skipped.

The log is livematch's own format, so a broken *line* (not JSON, missing ``at``) is an
error naming the file and line; a bad *payload* inside a good line is just a message the
pipeline will reject, as it would have live.
"""

from __future__ import annotations

import gzip
import json
import math
import os
from collections.abc import Iterator
from pathlib import Path
from types import TracebackType
from typing import IO, NamedTuple

import msgspec

from livematch.errors import LivematchError

__all__ = ["BadReplayLogError", "LogEntry", "ReplayLogWriter", "payload_for_log",
           "read_replay_log"]


class BadReplayLogError(LivematchError):
    """A replay log cannot be read: missing file, broken gzip, or a malformed line."""


class LogEntry(NamedTuple):
    """One recorded message: receive time (epoch s), topic, and the payload bytes."""

    at: float
    topic: str
    payload: bytes


class _Line(msgspec.Struct, frozen=True):
    at: float
    topic: str
    payload: msgspec.Raw


_LINE = msgspec.json.Decoder(_Line)
_STR = msgspec.json.Decoder(str)


def _open(path: Path, mode: str) -> IO[bytes]:
    if path.name.endswith(".gz"):
        # mtime=0 keeps written .gz files byte-identical across runs.
        return gzip.GzipFile(path, mode, mtime=0)  # type: ignore[return-value]
    return open(path, mode)


def read_replay_log(path: str | os.PathLike[str]) -> Iterator[LogEntry]:
    r"""Yield the entries of a replay log in file order.

    Object payloads are handed on as their exact bytes in the log line (no re-encoding,
    so ``1e999`` or ``1.50`` reach the decoder as written); string payloads as their
    UTF-8 encoding.

    Raises:
        BadReplayLogError: naming the file (and the 1-based line for a malformed line).

    Example (a degenerate log: one blank line only yields nothing):
        >>> import tempfile, pathlib
        >>> p = pathlib.Path(tempfile.mkdtemp()) / "empty.jsonl"
        >>> _ = p.write_text("\n")
        >>> list(read_replay_log(p))
        []
    """
    path = Path(path)
    try:
        stream = _open(path, "rb")
    except OSError as exc:
        raise BadReplayLogError(f"cannot open replay log {str(path)!r}: {exc}") from exc
    with stream:
        lineno = 0
        try:
            for lineno, line in enumerate(stream, start=1):
                if not line.strip():
                    continue
                yield _entry(line, path, lineno)
        except (OSError, EOFError) as exc:  # gzip.BadGzipFile is an OSError
            raise BadReplayLogError(
                f"{path}: cannot read past line {lineno}: {exc}") from exc


def _entry(line: bytes, path: Path, lineno: int) -> LogEntry:
    try:
        rec = _LINE.decode(line)
    except msgspec.DecodeError as exc:
        return _entry_with_surrogates(line, path, lineno, exc)
    if not math.isfinite(rec.at):
        raise BadReplayLogError(f"{path}:{lineno}: `at` must be finite, got {rec.at!r}")
    raw = bytes(rec.payload)
    if raw[:1] == b'"':
        raw = _STR.decode(raw).encode("utf-8")
    return LogEntry(rec.at, rec.topic, raw)


def _entry_with_surrogates(line: bytes, path: Path, lineno: int, exc: Exception) -> LogEntry:
    r"""Read a line msgspec refused: valid only if it is a string payload with ``\udcXX``.

    Those escapes (non-UTF-8 bytes written with ``surrogateescape``) are lone surrogates,
    which msgspec refuses and the standard library's json accepts.
    """
    try:
        rec = json.loads(line)
    except ValueError:
        rec = None
    if isinstance(rec, dict):
        at, topic, payload = rec.get("at"), rec.get("topic"), rec.get("payload")
        if (isinstance(at, int | float) and not isinstance(at, bool) and math.isfinite(at)
                and isinstance(topic, str) and isinstance(payload, str)):
            try:
                return LogEntry(float(at), topic, payload.encode("utf-8", "surrogateescape"))
            except UnicodeEncodeError:
                pass
    raise BadReplayLogError(
        f"{path}:{lineno}: not a replay log line ({exc}); expected "
        '{"at": <epoch s>, "topic": "...", "payload": {...} | "..."}') from exc


def payload_for_log(payload: bytes) -> bytes:
    r"""Return the JSON text that stands for ``payload`` in a log line.

    A UTF-8 JSON object on one line is embedded verbatim (so its bytes, spacing and
    number tokens such as ``1e999`` survive); anything else (invalid JSON, a bare
    number, an object spread over lines, bytes that are not UTF-8) becomes a JSON string
    of the original text, non-UTF-8 bytes as ``\udcXX`` escapes.
    :func:`read_replay_log` gives back the original bytes in every case.

    >>> payload_for_log(b'{"lat": 60.1, "lon": 1e999}')
    b'{"lat": 60.1, "lon": 1e999}'
    >>> payload_for_log(b'{"lat": 60.1,\n "lon": NaN}')
    b'"{\\"lat\\": 60.1,\\n \\"lon\\": NaN}"'
    >>> payload_for_log(b"\xff")
    b'"\\udcff"'
    >>> payload_for_log(b"")
    b'""'
    """
    try:
        text = payload.decode("utf-8")
    except UnicodeDecodeError:
        return json.dumps(payload.decode("utf-8", "surrogateescape")).encode("ascii")
    if payload[:1] == b"{" and payload[-1:] == b"}" and not any(c in text for c in "\n\r"):
        try:
            msgspec.json.format(payload)  # checks the JSON syntax, token by token
        except msgspec.DecodeError:
            pass
        else:
            return payload
    return msgspec.json.encode(text)


class ReplayLogWriter:
    r"""Append received messages to a replay log (gzip when the name ends in ``.gz``).

    Example:
        >>> import tempfile, pathlib
        >>> p = pathlib.Path(tempfile.mkdtemp()) / "feed.jsonl"
        >>> with ReplayLogWriter(p) as log:
        ...     log.write(1.5, "fleet/a/position", b'{"lat":1}')
        >>> p.read_text()
        '{"at":1.5,"topic":"fleet/a/position","payload":{"lat":1}}\n'
    """

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self.path = Path(path)
        try:
            self._stream = _open(self.path, "wb")
        except OSError as exc:
            raise BadReplayLogError(f"cannot write replay log {str(path)!r}: {exc}") from exc

    def write(self, at: float, topic: str, payload: bytes) -> None:
        """Record one message received at ``at`` (epoch seconds) on ``topic``."""
        head = msgspec.json.encode({"at": float(at), "topic": topic})
        self._stream.write(head[:-1] + b',"payload":' + payload_for_log(payload) + b"}\n")

    def close(self) -> None:
        """Flush and close the file."""
        self._stream.close()

    def __enter__(self) -> ReplayLogWriter:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.close()
