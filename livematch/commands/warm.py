"""``livematch warm``: compile the matcher's kernels into numba's disk cache, then exit.

With the kernels compiled ahead of time by the install (``livematch/core/_jit.py``: the
default of a compiled install) there is nothing to compile: the command says so, and
still checks ``--network`` as below. What follows is for the kernels under numba's JIT
(``LIVEMATCH_KERNELS=jit``, a pure-Python install, or a stale build).

The first ``livematch run`` after installing or changing livematch compiles its kernels
(numba): 36 s of CPU, 74 s wall on 2 busy cores, and a worker stopped meanwhile starts
cold again. Run this once where the daemon will run (a container image's build step,
an install script) and every later start loads the compiled code in about a second.

numba keeps the cache in ``__pycache__`` beside livematch's sources, or under
``NUMBA_CACHE_DIR`` when that is set (the same value must be set for ``livematch run``),
and uses it only on a machine whose CPU model and features match the one that compiled
it; ``NUMBA_CPU_NAME=generic`` (set for both commands) compiles code any x86-64 CPU can
load, at some cost in speed. The command prints how many kernels were compiled and how
many loaded from the cache: a second run on the same machine compiles none.

``--network PATH`` (or ``--config FILE``'s ``inputs.network``) also reads the road
network and builds the pipeline exactly as ``livematch run`` would, so a bad map fails
here (exit code 2) rather than at the daemon's start.
"""

from __future__ import annotations

import argparse
import sys
import time
from typing import Any

from livematch.config import load_config


def register(subparsers: Any) -> None:
    """Add the ``warm`` command to the CLI."""
    parser = subparsers.add_parser(
        "warm", help="compile the matcher's kernels into numba's disk cache and exit",
        description="Compile (or load) the matcher's kernels so that later starts of "
                    "`livematch run` need not; optionally check the road network.")
    parser.add_argument("--config", metavar="FILE",
                        help="daemon configuration file (TOML): its network is also read")
    parser.add_argument("--network", metavar="PATH",
                        help="also read this road map (OpenStreetMap, GeoJSON or .lmnet) "
                             "and build the pipeline as `livematch run` does")
    parser.set_defaults(func=_warm)


def kernel_counts() -> tuple[int, int]:
    """(compiled in this process, loaded from the disk cache) over livematch's kernels.

    Counts the signatures of every numba dispatcher found in the loaded
    ``livematch`` modules, from numba's own per-dispatcher cache statistics.

    Compiled counts every signature numba compiled, kernels called by other kernels
    included; loaded counts those taken whole from the cache. A process that only
    imported livematch has ``(0, 0)``.

    Example::

        >>> from livematch.pipeline import prepare_kernels
        >>> prepare_kernels()
        >>> compiled, loaded = kernel_counts()
        >>> from livematch.core import _jit  # (ahead of time: no dispatcher to count)
        >>> compiled + loaded >= 20 if _jit.mode() == "jit" else (compiled, loaded) == (0, 0)
        True
    """
    from livematch.core import _jit

    if _jit.mode() == "aot":  # (no dispatchers; importing numba would cost 65 MB)
        return 0, 0
    from numba.core.dispatcher import Dispatcher

    compiled = loaded = 0
    seen: set[int] = set()
    for name, module in list(sys.modules.items()):
        if not name.startswith("livematch.") or module is None:
            continue
        for value in list(vars(module).values()):
            if not isinstance(value, Dispatcher) or id(value) in seen:
                continue
            seen.add(id(value))
            stats = value.stats
            loaded += sum(stats.cache_hits.values())
            compiled += sum(stats.cache_misses.values())
    return compiled, loaded


def _warm(args: argparse.Namespace) -> int:
    from livematch.pipeline import prepare_kernels

    started, cpu = time.monotonic(), time.process_time()
    prepare_kernels()
    compiled, loaded = kernel_counts()
    from livematch.core import _jit

    if _jit.mode() == "aot":
        print(f"kernels ready in {time.monotonic() - started:.1f} s: compiled ahead of "
              "time by the install, nothing to compile")
    else:
        print(f"kernels ready in {time.monotonic() - started:.1f} s "
              f"({time.process_time() - cpu:.1f} s CPU): {compiled} compiled, "
              f"{loaded} loaded from the cache")
    if args.network or args.config:
        from livematch.commands.run import build_pipeline

        config = load_config(args.config, overrides={"network": args.network})
        started = time.monotonic()
        build_pipeline(config)
        print(f"network {config.inputs.network}: read, pipeline built in "
              f"{time.monotonic() - started:.1f} s")
    return 0
