"""Two worker processes, one per source tree, asked in turn: the plumbing of an A/B bench.

``bench/ab.py`` and ``bench/kernel_ab.py`` time the same work in two checkouts. Each
checkout runs in a worker process of its own (``PYTHONPATH`` = the tree, so each imports
its own ``livematch``), started from the same command line with ``--worker``; a worker
prints ``ready`` once it has built what it times, then answers each request line on stdin
with one JSON value on stdout. The parent alternates which tree goes first, so that a
drift in the machine's speed falls on both sides alike.
"""

from __future__ import annotations

import json
import os
import subprocess
from pathlib import Path
from typing import Any


class WorkerPair:
    """The base and the new tree's workers, started from ``command`` (``--worker`` added by
    the caller)."""

    def __init__(self, command: list[str], base: str, new: str,
                 new_args: list[str] | None = None, base_env: dict[str, str] | None = None,
                 new_env: dict[str, str] | None = None) -> None:
        """``new_args``: added to the new worker's command only (its own settings);
        ``base_env`` / ``new_env``: added to one worker's environment (e.g. the kernels'
        ``LIVEMATCH_KERNELS``)."""
        self.base = self._start(command, base, base_env or {})
        self.new = self._start(command + (new_args or []), new, new_env or {})

    @staticmethod
    def _start(command: list[str], tree: str, env: dict[str, str]) -> subprocess.Popen[str]:
        proc = subprocess.Popen(command, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                text=True, env={**os.environ, **env,
                                                "PYTHONPATH": str(Path(tree).resolve())})
        assert proc.stdout is not None and proc.stdout.readline().strip() == "ready"
        return proc

    @staticmethod
    def _ask(proc: subprocess.Popen[str], request: str) -> Any:
        assert proc.stdin is not None and proc.stdout is not None
        proc.stdin.write(request + "\n")
        proc.stdin.flush()
        return json.loads(proc.stdout.readline())

    def ask_both(self, request: str, base_first: bool) -> tuple[Any, Any]:
        """Both workers' answers to ``request``, (base, new), asked in the given order."""
        if base_first:
            a = self._ask(self.base, request)
            return a, self._ask(self.new, request)
        b = self._ask(self.new, request)
        return self._ask(self.base, request), b

    def close(self) -> None:
        """End both workers (their stdin closes; each leaves its loop) and wait for them."""
        for proc in (self.base, self.new):
            assert proc.stdin is not None
            proc.stdin.close()
            proc.wait()
