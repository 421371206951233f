"""Build livematch, compiling its per-fix Python to C with mypyc where it can.

Everything else about the package is in ``pyproject.toml``; this file only adds the
compiled modules. mypyc (part of the mypy project, the compiler mypy and black ship
with) turns the type-annotated modules listed in ``NATIVE`` into C extensions: the same
source, the same behaviour, run without the interpreter's per-bytecode dispatch, boxed
floats and dictionary look-ups for attributes. The per-fix path is hundreds of small
rules in Python around the numba kernels; compiled it costs about a third less per fix
(``bench/ab.py --what pipeline``, docs/measured.md "Session 24 (native)"). numba stays
for the array kernels (``livematch/core/_*kernel*.py``): mypyc compiles Python logic, not
loops over numpy arrays.

The compiled build needs a C compiler and the Python headers (Debian: ``gcc`` and
``python3-dev``; ``scripts/test`` and ``scripts/first-run`` install them when missing).
``LIVEMATCH_PURE_PYTHON=1`` at install time builds without them: the same package in
pure Python (slower, identical outputs; the tests pass either way).
``python -m livematch.native`` says which of the two is installed.
"""

from __future__ import annotations

import hashlib
import json
import os
import sys
from pathlib import Path

from setuptools import setup

HERE = Path(__file__).resolve().parent

#: The modules compiled with mypyc: the tracker and what it calls on every fix, and the
#: rest of the per-message path around it (the fix and event classes, the projection,
#: the decoder, the pipeline). A module with numba kernels cannot be listed (numba
#: compiles Python functions, not C ones).
NATIVE = [
    "livematch/core/tracker.py",
    "livematch/core/candidates.py",
    "livematch/core/view.py",
    "livematch/core/sweep.py",
    "livematch/core/fastsweep.py",
    "livematch/core/heading.py",
    "livematch/core/isotonic.py",
    "livematch/core/wayout.py",
    "livematch/core/startroots.py",
    "livematch/core/routing.py",
    "livematch/core/monitors/fences.py",
    "livematch/core/monitors/route.py",
    "livematch/core/monitors/vehicle.py",
    "livematch/core/monitors/presence.py",
    "livematch/core/fix.py",
    "livematch/core/events.py",
    "livematch/core/geometry.py",
    "livematch/feed/decode.py",
    "livematch/pipeline.py",
]

#: The shared library the compiled modules link against, inside the package (a name
#: without a package would put it at the top level of site-packages).
GROUP = "livematch.core._native"

#: What was compiled from which source (read by ``livematch.native``: a compiled module
#: whose ``.py`` changed since is stale, and the tests refuse to run with it).
MANIFEST = HERE / "livematch" / "core" / "_native_build.json"


def _module(path: str) -> str:
    return path.removesuffix(".py").replace("/", ".")


def _drop_built() -> None:
    """Remove compiled modules left in the source tree by an earlier in-place build."""
    MANIFEST.unlink(missing_ok=True)
    stems = [Path(p) for p in NATIVE] + [Path(GROUP.replace(".", "/") + "__mypyc")]
    for stem in stems:
        for so in (HERE / stem.parent).glob(stem.stem + ".*.so"):
            so.unlink()


def native_extensions() -> list:  # type: ignore[type-arg]
    """The C extensions for ``NATIVE`` (and the manifest), or none when asked for pure."""
    if os.environ.get("LIVEMATCH_PURE_PYTHON", "") not in ("", "0"):
        print("livematch: LIVEMATCH_PURE_PYTHON set: building pure Python", file=sys.stderr)
        _drop_built()
        return []
    from mypyc.build import mypycify

    extensions = mypycify(NATIVE, opt_level="3", group_name=GROUP)
    modules = {_module(p): hashlib.sha256((HERE / p).read_bytes()).hexdigest()
               for p in NATIVE}
    MANIFEST.write_text(json.dumps({"compiler": "mypyc", "modules": modules}, indent=1) + "\n")
    return extensions


setup(ext_modules=native_extensions())
