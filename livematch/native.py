"""Which of livematch's modules run compiled (mypyc), and whether any is stale.

``setup.py`` compiles the per-fix modules with mypyc and writes the list, with a hash of
each module's source as compiled, to ``livematch/core/_native_build.json``. A compiled
module is loaded instead of its ``.py`` whatever the ``.py`` says now, so an edited
module in a checkout keeps running the code it was compiled from until it is rebuilt:
:func:`stale` names such modules, the test suite refuses to run with any, and
``python -m livematch.native`` prints the state (exit status 1 when stale)::

    $ .venv/bin/python -m livematch.native
    compiled (mypyc): 19 modules, none stale

Rebuild after editing a compiled module: ``.venv/bin/pip install -e .`` (what
``scripts/test`` does) or, in a checkout that is not the installed one,
``scripts/build-native``.
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.abc
import importlib.machinery
import importlib.util
import json
import os
import sys
from collections.abc import Sequence
from pathlib import Path
from types import ModuleType

_PACKAGE = Path(__file__).resolve().parent
#: Written by setup.py when it compiles: {"modules": {dotted name: sha256 of the source}},
#: and, for the kernels compiled ahead of time (``livematch.core._jit``), ``"kernels"``:
#: {dotted name of each module the extension was built from: sha256 of its source}.
MANIFEST = _PACKAGE / "core" / "_native_build.json"


def source_hash(path: Path) -> str:
    """The sha256 of a module's source file (what the manifest records at build time)."""
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _manifest(part: str) -> dict[str, str]:
    """One part of the manifest (``"modules"`` or ``"kernels"``); empty when not built."""
    try:
        data = json.loads(MANIFEST.read_text())
    except FileNotFoundError:
        return {}
    entries = data.get(part, {})
    return {str(k): str(v) for k, v in entries.items()}


def built() -> dict[str, str]:
    """The modules the last build compiled, with their sources' hashes (empty: pure)."""
    return _manifest("modules")


def built_kernels() -> dict[str, str]:
    """The modules the ahead-of-time kernels were built from, with their sources' hashes."""
    return _manifest("kernels")


def _changed(entries: dict[str, str]) -> list[str]:
    """The dotted names among ``entries`` whose ``.py`` is missing or hashes otherwise."""
    out = []
    for name, digest in entries.items():
        path = _PACKAGE.parent / (name.replace(".", "/") + ".py")
        if not path.exists() or source_hash(path) != digest:
            out.append(name)
    return out


#: Environment variable choosing how the kernels run (``livematch.core._jit``): unset or
#: empty, compiled ahead of time when built and current, else numba's JIT; ``jit``:
#: numba's JIT; ``checked``: ahead of time with every call's arguments checked against
#: the compiled signature first (the test suite's setting; slower).
KERNELS_ENV = "LIVEMATCH_KERNELS"


def kernels_choice() -> tuple[ModuleType | None, bool]:
    """The ahead-of-time kernels' extension for this process, and whether to check calls.

    (None, False): numba's JIT. The second value is whether every call's arguments are
    checked first (``KERNELS_ENV`` ``checked``). numba's JIT when asked for, when the
    process imports livematch from source, or when the extension is missing or stale.

    Raises:
        ValueError: ``KERNELS_ENV`` has another value (named, with the ones it takes).
    """
    want = os.environ.get(KERNELS_ENV, "")
    if want not in ("", "jit", "checked"):
        raise ValueError(f"{KERNELS_ENV}={want!r}: expected 'jit', 'checked' or nothing")
    if want == "jit" or pure_process() or not kernels_current():
        return None, False
    try:
        module = importlib.import_module("livematch.core._aot_kernels")
    except ImportError:
        return None, False
    return module, want == "checked"


def kernels_current() -> bool:
    """Whether the ahead-of-time kernels were built from the kernel modules as they are now.

    False when none were built or a module they were built from has changed since (the
    extension would run the old code: ``livematch.core._jit`` then uses numba's JIT).
    """
    entries = built_kernels()
    return bool(entries) and not _changed(entries)


def compiled() -> list[str]:
    """The modules of the last build that are loaded from a compiled extension."""
    out = []
    for name in built():
        module = importlib.import_module(name)
        origin = getattr(module, "__file__", None) or ""
        if origin.endswith(tuple(importlib.machinery.EXTENSION_SUFFIXES)):
            out.append(name)
    return out


def stale() -> list[str]:
    """Compiled modules whose ``.py`` has changed since they were compiled.

    Each would run the old code: rebuild (module docstring). Pure modules are never stale.
    A changed kernel module that the ahead-of-time kernels were built from is listed too
    (the process falls back to numba's JIT for all kernels until the rebuild).
    """
    return _changed(built()) + [n for n in _changed(built_kernels()) if n not in built()]


class _SourceFirst(importlib.abc.MetaPathFinder):
    """Find ``livematch.*`` modules as their ``.py`` source even where a compiled one lies."""

    def find_spec(self, fullname: str, path: Sequence[str] | None,
                  target: ModuleType | None = None) -> importlib.machinery.ModuleSpec | None:
        """The source file's spec for a livematch module (None: not ours, or a package)."""
        if not fullname.startswith("livematch.") or not path:
            return None
        leaf = fullname.rpartition(".")[2]
        for folder in path:
            source = Path(folder) / (leaf + ".py")
            if source.is_file():
                return importlib.util.spec_from_file_location(fullname, source)
            if (Path(folder) / leaf / "__init__.py").is_file():
                return None  # a package: the usual finders
        return None


def prefer_source() -> None:
    """From now on, import livematch's modules from their ``.py`` files (pure Python).

    Called by ``livematch/__init__.py`` when ``LIVEMATCH_PURE_PYTHON`` is set, before any
    compiled module is imported; modules imported already stay as they are.
    """
    if not any(isinstance(f, _SourceFirst) for f in sys.meta_path):
        sys.meta_path.insert(0, _SourceFirst())


def pure_process() -> bool:
    """Whether this process imports livematch from source (``LIVEMATCH_PURE_PYTHON``)."""
    return any(isinstance(f, _SourceFirst) for f in sys.meta_path)


def source_module(relative: str, name: str) -> ModuleType:
    """A livematch module's ``.py`` file loaded once more, as a plain module ``name``.

    ``relative`` is the file's path inside the package (``"core/tracker.py"``). The
    copy runs as Python whatever is installed, so a test can hold a compiled module's
    behaviour against its own source. Registered in ``sys.modules`` under ``name``
    first: dataclasses and pickling look classes' modules up by name. Not cached: the
    caller keeps the module.
    """
    path = Path(__file__).parent / relative
    spec = importlib.util.spec_from_file_location(name, path)
    if spec is None or spec.loader is None:
        raise ImportError(f"cannot load {path} as a module")
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module


def kernels_why() -> str:
    """Why this process's kernels run as they do (``livematch.core._jit`` has chosen).

    ``ahead of time`` (the extension, current), or why numba's JIT runs them:
    ``asked`` (``KERNELS_ENV=jit``), ``from source`` (``LIVEMATCH_PURE_PYTHON``), ``not
    built`` (no extension: a pure-Python install, or the build failed), ``stale`` (a
    kernel module changed since the build) or ``not loadable`` (built and current, but
    the import failed: a missing or moved file). Under the JIT a cold cache costs about
    40 s of CPU at start, and the worker's base is some 130 MB larger.
    """
    from livematch.core import _jit

    if _jit.mode() == "aot":
        return "ahead of time"
    if os.environ.get(KERNELS_ENV, "") == "jit":
        return "asked"
    if pure_process():
        return "from source"
    if not built_kernels():
        return "not built"
    return "stale" if not kernels_current() else "not loadable"


def build_info() -> dict[str, str]:
    """How this process runs livematch, as the labels of ``livematch_build_info``.

    ``modules``: ``compiled`` (mypyc) or ``pure``; ``stale``: compiled modules whose
    source changed since the build (comma-separated, empty when none); ``kernels``:
    ``aot`` or ``jit``; ``kernels_why``: :func:`kernels_why`.
    """
    from livematch import __version__
    from livematch.core import _jit

    return {"version": __version__,
            "modules": "compiled" if compiled() and not pure_process() else "pure",
            "stale": ",".join(stale()), "kernels": _jit.mode(), "kernels_why": kernels_why()}


def describe() -> str:
    """One line for a benchmark's header: how this process runs livematch."""
    if pure_process():
        return "livematch from source (LIVEMATCH_PURE_PYTHON)"
    names = compiled()
    from livematch.core import _jit

    kernels = ("kernels ahead of time" if _jit.mode() == "aot"
               else "kernels by numba's JIT")
    if not names:
        return f"livematch pure Python, {kernels}"
    return f"livematch compiled (mypyc, {len(names)} modules, {kernels})"


def main() -> int:
    """Print whether livematch runs compiled, and which modules are stale."""
    names = compiled()
    old = stale()
    if pure_process():
        print("pure Python (LIVEMATCH_PURE_PYTHON is set"
              + (f"; the install has {len(built())} compiled modules)" if built() else ")"))
    elif not names:
        print("pure Python (no compiled modules)")
    else:
        print(f"compiled (mypyc): {len(names)} modules, "
              + (f"stale: {', '.join(old)}" if old else "none stale"))
    from livematch.core import _jit

    why = kernels_why()
    if _jit.mode() == "aot":
        print(f"kernels: ahead of time ({len(built_kernels())} modules, none stale)")
    else:
        print(f"kernels: numba's JIT ({why}"
              + ("; rebuild: python -m livematch._aot_build)" if why == "stale" else ")"))
    return 1 if old else 0


if __name__ == "__main__":
    sys.exit(main())
