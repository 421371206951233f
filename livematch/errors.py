"""The package's errors, arranged by meaning.

Every error livematch raises on purpose derives from :class:`LivematchError`, so a
caller can catch "anything livematch refused" in one place, and the subclasses say
what went wrong. Messages name the offending value and where it came from.
"""

from __future__ import annotations


class LivematchError(Exception):
    """Root of every error livematch raises on purpose."""


class BadNetworkError(LivematchError):
    """A road-network source or compiled file cannot be used (not a map, empty, broken)."""


class BadConfigError(LivematchError):
    """A configuration file or value is invalid; the message names the file and the key."""


class BadMessageError(LivematchError):
    """An incoming position message cannot be accepted.

    Args:
        reason: a short machine-readable reason code (e.g. ``"not_json"``).
        detail: a human sentence naming the offending value.
    """

    def __init__(self, reason: str, detail: str) -> None:
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail


class BadStateError(LivematchError):
    """Serialised vehicle state cannot be restored (wrong version, truncated, other network)."""


class UnknownRouteError(LivematchError):
    """A vehicle refers to a route id that is not loaded."""


class UnknownVehicleError(LivematchError, KeyError):
    """The pipeline holds no state for the vehicle asked about.

    Defined here rather than in :mod:`livematch.pipeline` (which exports it too): that
    module is compiled with mypyc (setup.py ``NATIVE``), which cannot compile a subclass
    of a built-in exception such as :class:`KeyError` as a native class.
    """

    def __str__(self) -> str:
        return str(self.args[0]) if self.args else ""
