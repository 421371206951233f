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
import subprocess
import sys
from pathlib import Path

from setuptools import setup
from setuptools.command.build_ext import build_ext

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
    stems = [Path(p) for p in NATIVE] + [Path(GROUP.replace(".", "/") + "__mypyc"),
                                         Path(KERNELS.replace(".", "/"))]
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
    data = {"compiler": "mypyc", "modules": modules}
    try:  # the ahead-of-time kernels' part, as their build wrote it (BuildWithKernels)
        old = json.loads(MANIFEST.read_text())
        data.update({k: old[k] for k in ("kernels", "kernels_file") if k in old})
    except (FileNotFoundError, ValueError):
        pass
    MANIFEST.write_text(json.dumps(data, indent=1) + "\n")
    return extensions


#: The kernels compiled ahead of time (``livematch/core/_jit.py``): numba's own compiler
#: (``numba.pycc``) turns the array kernels a worker calls into one C extension, so a
#: worker runs them without importing numba (about 140 MB less resident each).
KERNELS = "livematch.core._aot_kernels"


class BuildWithKernels(build_ext):
    """``build_ext``, then the ahead-of-time kernels when the environment can build them.

    They are compiled from the kernel modules by numba, run in a process of the target
    environment (not pip's isolated build environment, which has no numba): on a fresh
    environment numba is not installed yet when pip builds, so the build leaves them out
    and says so; ``scripts/test`` and ``scripts/first-run`` then build them
    (``python -m livematch._aot_build``). Without them the kernels run under
    numba's JIT: the same results, more memory.
    """

    def run(self) -> None:
        """Build the mypyc extensions, then try the kernels (a failure only warns)."""
        super().run()
        if os.environ.get("LIVEMATCH_PURE_PYTHON", "") not in ("", "0"):
            return
        out = Path(self.get_ext_fullpath(KERNELS)).parent
        env = {k: v for k, v in os.environ.items()
               if k not in ("PYTHONPATH", "PYTHONNOUSERSITE", "PYTHONHOME")}
        env["PYTHONPATH"] = str(HERE)
        done = subprocess.run([sys.executable, "-m", "livematch._aot_build",
                               "--out", str(out)], cwd=HERE, env=env, check=False)
        if done.returncode != 0:
            print("livematch: kernels not compiled ahead of time (numba is not installed "
                  "yet?); run `python -m livematch._aot_build` after the install",
                  file=sys.stderr)


setup(ext_modules=native_extensions(), cmdclass={"build_ext": BuildWithKernels})
