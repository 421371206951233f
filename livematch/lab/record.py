r"""Recording a live feed as a replay log, every message as received, rotating files.

:class:`RecordingTap` sits where messages arrive (``livematch record``, or the daemon
before it hands a message to the pipeline) and writes each one, whatever it contains,
with :class:`~livematch.feed.replaylog.ReplayLogWriter`: ``{"at", "topic", "payload"}``
per line, gzip when the name ends in ``.gz``. Rejected messages are recorded too, so a
replay of the recording rejects exactly what the live run rejected.

Files are never overwritten. The first file is ``PATH`` itself; each rotation (and each
start that finds ``PATH`` already there, e.g. a restarted daemon) opens the next free
*segment*, named by inserting a five-digit index before the log suffixes::

    feed.jsonl.gz  ->  feed.00001.jsonl.gz  ->  feed.00002.jsonl.gz  ...

:func:`recording_files` lists a recording's files in order, ready for
``livematch replay``. Rotation is by size (bytes of log lines written, before
compression, so the limit does not depend on how well the feed compresses) and/or by
receive time (seconds of ``at`` covered by one file, so rotation follows the messages'
own clock and a test or a replay of the tap is deterministic).

Two ways to hook it into the daemon, both recording with the very ``at`` the daemon
hands to :meth:`Pipeline.handle <livematch.pipeline.Pipeline.handle>`, so that a replay
of the recording reproduces even the reject records' ``at``:

* no change to the daemon: wrap its pipeline where it is built (``build_daemon``)::

      pipeline = RecordingPipeline(pipeline, tap)     # records, then handles
      ...
      tap.close()                                    # after daemon.run() returned

* or one call in ``Daemon._process``, before the pipeline::

      at = time.time()
      if self.recorder is not None:
          self.recorder.record(at, topic, payload)
      outputs = self.pipeline.handle(topic, payload, at)

:meth:`RecordingTap.record` never raises on a write failure (disk full, folder gone): it
logs, counts :attr:`RecordingTap.errors` and tries a fresh segment on the next message,
so recording trouble never stops the matching.
"""

from __future__ import annotations

import contextlib
import logging
import math
import os
import re
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType
from typing import TYPE_CHECKING, Any

from livematch.errors import LivematchError
from livematch.feed.replaylog import ReplayLogWriter, payload_for_log

if TYPE_CHECKING:
    from livematch.pipeline import Output, Pipeline

__all__ = ["RecordSettings", "RecordingPipeline", "RecordingTap", "recording_files",
           "segment_path"]

log = logging.getLogger("livematch.record")

#: Log suffixes kept at the end of a segment name (longest first).
_SUFFIXES = (".jsonl.gz", ".ndjson.gz", ".json.gz", ".jsonl", ".ndjson", ".json", ".gz")
#: Shortest interval between two "recording failed" warnings, seconds of receive time.
_WARN_EVERY_S = 60.0


class BadRecordingError(LivematchError):
    """A recording cannot be started (bad path or settings)."""


def _split(path: Path) -> tuple[str, str]:
    name = path.name
    for suffix in _SUFFIXES:
        if name.endswith(suffix) and len(name) > len(suffix):
            return name[: -len(suffix)], suffix
    return name, ""


def segment_path(path: str | os.PathLike[str], index: int) -> Path:
    """The file of segment ``index`` of the recording ``path`` (0 is ``path`` itself).

    >>> segment_path("logs/feed.jsonl.gz", 3).as_posix()
    'logs/feed.00003.jsonl.gz'
    >>> segment_path("feed.jsonl", 0).as_posix()
    'feed.jsonl'
    >>> segment_path("feed", 12).as_posix()     # degenerate: no suffix at all
    'feed.00012'
    """
    p = Path(path)
    if index == 0:
        return p
    stem, suffix = _split(p)
    return p.with_name(f"{stem}.{index:05d}{suffix}")


def recording_files(path: str | os.PathLike[str]) -> list[Path]:
    """The existing files of the recording ``path``, in the order they were written.

    ``path`` first (when it exists), then its segments by index.

    >>> import tempfile
    >>> d = Path(tempfile.mkdtemp())
    >>> for name in ("feed.00002.jsonl", "feed.jsonl", "other.jsonl", "feed.00001.jsonl"):
    ...     _ = (d / name).write_text("")
    >>> [p.name for p in recording_files(d / "feed.jsonl")]
    ['feed.jsonl', 'feed.00001.jsonl', 'feed.00002.jsonl']
    >>> recording_files(d / "none.jsonl")    # degenerate: nothing recorded
    []
    """
    p = Path(path)
    stem, suffix = _split(p)
    pattern = re.compile(re.escape(stem) + r"\.(\d{5})" + re.escape(suffix) + r"\Z")
    found: list[tuple[int, Path]] = [(0, p)] if p.is_file() else []
    if p.parent.is_dir():
        for child in p.parent.iterdir():
            m = pattern.match(child.name)
            if m and child.is_file():
                found.append((int(m.group(1)), child))
    return [f for _, f in sorted(found)]


@dataclass(frozen=True, kw_only=True)
class RecordSettings:
    """Where and how to record (the ``[record]`` section a daemon configuration may hold).

    Attributes:
        path: the recording's first file; ``""`` records nothing. A name ending in
            ``.gz`` is gzip-compressed.
        rotate_mb: start a new segment after this many megabytes (10^6 bytes) of log
            lines (before compression); 0 never rotates by size.
        rotate_s: start a new segment once the current one covers this many seconds of
            receive time; 0 never rotates by time.
    """

    path: str = ""
    rotate_mb: float = 0.0
    rotate_s: float = 0.0

    def problems(self) -> list[tuple[str, str]]:
        """Every invalid value as (key, expectation with the value found).

        >>> RecordSettings(path="feed.jsonl.gz", rotate_s=3600).problems()
        []
        >>> RecordSettings(rotate_mb=-1).problems()
        [('rotate_mb', 'must be a number >= 0 (0: no size rotation), got -1')]
        """
        out: list[tuple[str, str]] = []
        for key in ("rotate_mb", "rotate_s"):
            value = getattr(self, key)
            if (isinstance(value, bool) or not isinstance(value, int | float)
                    or not math.isfinite(value) or value < 0):
                what = "size" if key == "rotate_mb" else "time"
                out.append((key, f"must be a number >= 0 (0: no {what} rotation), "
                                 f"got {value!r}"))
        return out

    def tap(self) -> RecordingTap | None:
        """The tap these settings describe, or None when ``path`` is empty."""
        if not self.path:
            return None
        return RecordingTap(self.path, rotate_bytes=int(self.rotate_mb * 1_000_000),
                            rotate_s=float(self.rotate_s))


class RecordingTap:
    r"""Write every received message to a replay log, rotating by size or receive time.

    Args:
        path: the first file (see the module docstring for segment names); its folder is
            created when missing.
        rotate_bytes: bytes of log lines per segment (0: no size rotation). A segment
            always takes at least one message, so a single huge message still lands.
        rotate_s: seconds of receive time per segment (0: no time rotation): a message
            whose ``at`` is ``rotate_s`` or more after the segment's first message starts
            the next segment.
        flush_s: hand buffered lines to the operating system whenever this many seconds
            of receive time have passed since the last flush (bounds what a crash
            loses; for gzip each flush costs a little compression).

    Raises:
        BadRecordingError: a negative limit, or ``path`` names a folder.

    Example (rotation every 2 s of receive time; ``at`` is the only clock):
        >>> import tempfile
        >>> d = Path(tempfile.mkdtemp())
        >>> with RecordingTap(d / "feed.jsonl", rotate_s=2.0) as tap:
        ...     for at in (10.0, 11.0, 12.0, 12.5):
        ...         tap.record(at, "fleet/a/position", b'{"lat": 1}')
        >>> [(p.name, len(p.read_text().splitlines())) for p in tap.files]
        [('feed.jsonl', 2), ('feed.00001.jsonl', 2)]
        >>> tap.messages, tap.errors
        (4, 0)
    """

    def __init__(self, path: str | os.PathLike[str], *, rotate_bytes: int = 0,
                 rotate_s: float = 0.0, flush_s: float = 1.0) -> None:
        if rotate_bytes < 0 or not math.isfinite(rotate_s) or rotate_s < 0 or flush_s < 0:
            raise BadRecordingError(
                f"recording {str(path)!r}: rotate_bytes, rotate_s and flush_s must be "
                f">= 0, got {rotate_bytes!r}, {rotate_s!r}, {flush_s!r}")
        self.path = Path(path)
        if self.path.is_dir():
            raise BadRecordingError(f"recording {str(path)!r} is a folder; give a file name "
                                    "such as feed.jsonl.gz")
        self.rotate_bytes = rotate_bytes
        self.rotate_s = rotate_s
        self.flush_s = flush_s
        #: Every file opened so far, in order.
        self.files: list[Path] = []
        #: Messages recorded, and write failures (each message lost counts once).
        self.messages = 0
        self.errors = 0
        self._writer: ReplayLogWriter | None = None
        self._index = 0
        self._bytes = 0
        self._first_at = 0.0
        self._flushed_at = -math.inf
        self._warned_at = -math.inf

    # -------------------------------------------------------------------- writing
    def record(self, at: float, topic: str, payload: bytes) -> None:
        """Record one message received at ``at`` (epoch seconds) on ``topic``.

        Never raises for a write failure: the message is counted in :attr:`errors`, a
        warning is logged (at most once a minute of receive time), and the next message
        opens a fresh segment.
        """
        size = self._line_size(topic, payload)
        try:
            if self._writer is None or self._due(at, size):
                self._open_next(at)
            assert self._writer is not None
            self._writer.write(at, topic, payload)
            self._bytes += size
            self.messages += 1
            if at - self._flushed_at >= self.flush_s:
                self.flush()
                self._flushed_at = at
        except (OSError, ValueError, LivematchError) as exc:  # ValueError: closed file
            self.errors += 1
            self._abandon()
            if at - self._warned_at >= _WARN_EVERY_S:
                self._warned_at = at
                log.warning("recording failed; message not recorded",
                            extra={"fields": {"path": str(self.path), "error": str(exc),
                                              "errors": self.errors}})

    def flush(self) -> None:
        """Hand the buffered lines of the current segment to the operating system."""
        if self._writer is not None:
            # ReplayLogWriter has no flush of its own; its stream is a file or GzipFile.
            self._writer._stream.flush()

    def close(self) -> None:
        """Close the current segment (a later :meth:`record` opens the next one)."""
        writer, self._writer = self._writer, None
        if writer is not None:
            writer.close()

    def __enter__(self) -> RecordingTap:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.close()

    # -------------------------------------------------------------------- segments
    @staticmethod
    def _line_size(topic: str, payload: bytes) -> int:
        # the line as ReplayLogWriter writes it: {"at":...,"topic":...,"payload":...}\n
        return 40 + len(topic.encode("utf-8", "surrogateescape")) + len(
            payload_for_log(payload))

    def _due(self, at: float, size: int) -> bool:
        if self.rotate_bytes and self._bytes and self._bytes + size > self.rotate_bytes:
            return True
        return bool(self.rotate_s) and at - self._first_at >= self.rotate_s

    def _open_next(self, at: float) -> None:
        self.close()
        if self.files:
            self._index += 1
        while segment_path(self.path, self._index).exists():
            self._index += 1  # never overwrite: a restart continues after what is there
        target = segment_path(self.path, self._index)
        target.parent.mkdir(parents=True, exist_ok=True)
        self._writer = ReplayLogWriter(target)
        self.files.append(target)
        self._bytes = 0
        self._first_at = at
        self._flushed_at = at

    def _abandon(self) -> None:
        writer, self._writer = self._writer, None
        if writer is not None:
            with contextlib.suppress(OSError):
                writer.close()


class RecordingPipeline:
    r"""A pipeline that records every message it is handed before handling it.

    It stands in for :class:`~livematch.pipeline.Pipeline` wherever one is used (the
    daemon takes it unchanged): :meth:`handle` writes ``(at, topic, payload)`` to the tap,
    then delegates; everything else is the wrapped pipeline's own. Closing the tap stays
    with the caller.

    Args:
        pipeline: the pipeline to wrap.
        tap: where the messages go.

    Example (a message the pipeline rejects is recorded all the same):
        >>> import tempfile
        >>> from livematch.core.build import Road, network_from_roads
        >>> from livematch.core.settings import MatchSettings
        >>> from livematch.pipeline import Pipeline
        >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
        >>> path = Path(tempfile.mkdtemp()) / "feed.jsonl"
        >>> with RecordingTap(path) as tap:
        ...     p = RecordingPipeline(Pipeline(net, MatchSettings()), tap)
        ...     [o.record["reason"] for o in p.handle("fleet/a/position", b"?", 5.0)]
        ['not_json']
        >>> path.read_text()
        '{"at":5.0,"topic":"fleet/a/position","payload":"?"}\n'
        >>> p.counters["reject:not_json"], p.vehicles()
        (1, [])
    """

    def __init__(self, pipeline: Pipeline, tap: RecordingTap) -> None:
        self.pipeline = pipeline
        self.tap = tap

    def handle(self, topic: str, payload: bytes, at: float) -> list[Output]:
        """Record the message, then handle it (see :meth:`Pipeline.handle`)."""
        self.tap.record(at, topic, payload)
        return self.pipeline.handle(topic, payload, at)

    @property
    def counters(self) -> Counter[str]:
        """The wrapped pipeline's counters."""
        return self.pipeline.counters

    @counters.setter
    def counters(self, value: Counter[str]) -> None:
        self.pipeline.counters = value

    def tick(self, now: float) -> list[Output]:
        """See :meth:`Pipeline.tick`."""
        return self.pipeline.tick(now)

    def flush(self) -> list[Output]:
        """See :meth:`Pipeline.flush`."""
        return self.pipeline.flush()

    def vehicles(self) -> list[str]:
        """See :meth:`Pipeline.vehicles`."""
        return self.pipeline.vehicles()

    def export_vehicle(self, vehicle: str) -> bytes:
        """See :meth:`Pipeline.export_vehicle`."""
        return self.pipeline.export_vehicle(vehicle)

    def import_vehicle(self, vehicle: str, blob: bytes) -> None:
        """See :meth:`Pipeline.import_vehicle`."""
        self.pipeline.import_vehicle(vehicle, blob)

    def evict_idle(self, now_fix_time: float, ttl_s: float, *,
                   into: list[Output] | None = None) -> list[str]:
        """See :meth:`Pipeline.evict_idle`."""
        return self.pipeline.evict_idle(now_fix_time, ttl_s, into=into)

    def park_idle(self, now: float, limit: int | None = None) -> int:
        """See :meth:`Pipeline.park_idle`."""
        return self.pipeline.park_idle(now, limit)

    def parked(self) -> int:
        """See :meth:`Pipeline.parked`."""
        return self.pipeline.parked()

    def __getattr__(self, name: str) -> Any:
        return getattr(self.pipeline, name)
