"""Give memory the C allocator holds but no longer uses back to the system (glibc).

A worker with tens of thousands of vehicles frees and allocates small arrays all the
time (each candidate tree is re-made when it fills up). glibc keeps the freed blocks
for reuse; the holes between live blocks are returned to the system only when asked
(``malloc_trim``), so the process's resident memory settles above what it holds
(``bench/memory.py``: several KB per driven vehicle). The daemon asks every
:data:`TRIM_EVERY_S` seconds from its checkpoint loop (:class:`Trimmer`); the matcher's
core knows nothing of this.

On a C library without ``malloc_trim`` (musl, macOS) :meth:`Trimmer.trim` does
nothing and :attr:`Trimmer.available` is False.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import math
from collections.abc import Callable

__all__ = ["TRIM_EVERY_S", "Trimmer"]

TRIM_EVERY_S = 60.0  # seconds between two trims (a trim is a walk over the free blocks)


def _libc_trim() -> Callable[[int], int] | None:
    """The C library's ``malloc_trim`` (glibc), or None where it has none."""
    name = ctypes.util.find_library("c") or "libc.so.6"
    try:
        libc = ctypes.CDLL(name)
        trim = libc.malloc_trim
    except (OSError, AttributeError):
        return None
    trim.argtypes = [ctypes.c_size_t]
    trim.restype = ctypes.c_int
    return trim


class Trimmer:
    """Call ``malloc_trim(0)`` at most once per ``every_s`` seconds.

    Args:
        every_s: the least time between two trims (seconds of the clock passed to
            :meth:`maybe`).
        trim: the trim function (tests pass their own); default glibc's.

    Example::

        >>> calls = []
        >>> t = Trimmer(60.0, trim=lambda pad: calls.append(pad) or 1)
        >>> [t.maybe(now) for now in (0.0, 30.0, 61.0, 100.0, 121.0)]
        [True, False, True, False, True]
        >>> t.due(150.0), t.due(181.0)
        (False, True)
        >>> calls
        [0, 0, 0]
    """

    def __init__(self, every_s: float = TRIM_EVERY_S,
                 trim: Callable[[int], int] | None = None) -> None:
        self.every_s = every_s
        self._trim = trim if trim is not None else _libc_trim()
        self._last = -math.inf
        self.trims = 0  # calls made

    @property
    def available(self) -> bool:
        """Whether there is a trim function (glibc)."""
        return self._trim is not None

    def trim(self) -> bool:
        """Trim now; returns whether memory was given back (False without glibc)."""
        if self._trim is None:
            return False
        self.trims += 1
        return bool(self._trim(0))

    def due(self, now: float) -> bool:
        """Whether :meth:`maybe` would trim at ``now`` (a check only, nothing called).

        The daemon asks this in its event loop every checkpoint round and hands only a
        due trim to a thread: a round trip through the thread pool cost more CPU than
        the check it carried, twice a second in every worker.
        """
        return self._trim is not None and now - self._last >= self.every_s

    def maybe(self, now: float) -> bool:
        """Trim if ``every_s`` has passed since the last trim; returns whether it did.

        ``now``: seconds, of any clock that does not go back.
        """
        if self._trim is None or now - self._last < self.every_s:
            return False
        self._last = now
        self.trim()
        return True
