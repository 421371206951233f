"""Build the ahead-of-time kernels (``livematch.core._aot_kernels``) with ``numba.pycc``.

Run by ``setup.py`` after the mypyc modules, and by ``scripts/test`` and
``scripts/first-run`` when the install could not: ``python -m livematch._aot_build``
(``--exports`` rewrites the list of kernels instead, after a kernel's signature changed).
What the extension is for and how a process picks it: :mod:`livematch.core._jit`.

Which kernels and with which signatures: :data:`livematch.core._aot_exports.EXPORTS`,
the kernels numba's JIT compiles when the service warms up
(:func:`livematch.pipeline.prepare_kernels`), each with every signature the JIT compiled
it for (the tests check that list against the JIT: ``tests/test_aot_kernels.py``). Each is
exported through a one-line wrapper that calls the kernel itself, so the kernel keeps
its own compile options (``error_model="numpy"``: a division by zero gives inf or nan
as under the JIT, not an exception; pycc would compile an exported body with Python's
error model).

Build-time only: imports numba, writes files. Never imported by a running service.
"""

from __future__ import annotations

import argparse
import hashlib
import importlib
import json
import os
import sys
import tempfile
from pathlib import Path
from typing import Any

_PACKAGE = Path(__file__).resolve().parent  # livematch/
_EXPORTS_FILE = _PACKAGE / "core" / "_aot_exports.py"
_MANIFEST = _PACKAGE / "core" / "_native_build.json"
_NAME = "_aot_kernels"

#: The CPU model the extension is compiled for: ``""`` is LLVM's generic model of the
#: architecture (numba.pycc's default), baseline x86-64 (SSE2) on x86-64, so an extension
#: built on one machine runs on any server of the same architecture (a wheel, an image).
#: ``"host"`` would add the build machine's extensions (AVX2, FMA, ...): measured 0.4-1 %
#: less CPU per fix on this machine (`bench/results/ab.s34-lead-cpuhost.txt`), not worth
#: a process that dies with SIGILL on an older CPU. `bench/kernelisa.py` counts them.
TARGET_CPU = ""

#: Modules whose kernels never go into the extension: the Fréchet toolkit (numba's JIT).
_JIT_ONLY = ("livematch.core._frechet_kernels",)


def _require_jit() -> None:
    """Refuse to run unless this process compiles kernels with numba (the reference)."""
    from livematch import native
    from livematch.core import _jit

    if _jit.mode() != "jit":
        raise SystemExit(f"set {native.KERNELS_ENV}=jit before livematch is imported")


def spell(t: Any) -> str:
    """A numba type as text that :func:`parse` reads back (``numba.types`` names).

    >>> import numba
    >>> spell(numba.types.Array(numba.types.int32, 1, "C"))
    "Array(int32, 1, 'C')"
    >>> spell(numba.types.UniTuple(numba.types.int64, 3))
    'UniTuple(int64, 3)'
    """
    from numba.core import types

    if isinstance(t, types.Array):
        return f"Array({spell(t.dtype)}, {t.ndim}, '{t.layout}')"
    if isinstance(t, types.UniTuple):
        return f"UniTuple({spell(t.dtype)}, {t.count})"
    if isinstance(t, types.Tuple):  # (literals spelled as their type: maybe all one)
        parts = [spell(x) for x in t.types]
        if len(set(parts)) == 1:
            return f"UniTuple({parts[0]}, {len(parts)})"
        return "Tuple((" + "".join(p + ", " for p in parts) + "))"
    if isinstance(t, types.Literal):
        return spell(t.literal_type)
    if isinstance(t, types.Boolean):
        return "boolean"
    if isinstance(t, types.NoneType):
        return "none"
    if isinstance(t, types.Integer | types.Float):
        return str(t)
    raise ValueError(f"no spelling for numba type {t!r}")


def parse(text: str) -> Any:
    """The numba type :func:`spell` wrote as ``text``."""
    from numba.core import types

    return eval(text, {"__builtins__": {}}, dict(vars(types)))


def _dispatchers() -> dict[str, Any]:
    """Every compiled livematch kernel with at least one signature, by ``module:qualname``."""
    from numba.core.registry import CPUDispatcher

    found: dict[str, Any] = {}
    for name, module in list(sys.modules.items()):
        if not name.startswith("livematch") or name in _JIT_ONLY:
            continue
        for obj in list(vars(module).values()):
            if isinstance(obj, CPUDispatcher) and obj.signatures:
                found[f"{obj.py_func.__module__}:{obj.py_func.__qualname__}"] = obj
    return found


Signature = tuple[str, tuple[str, ...]]  # (return type, argument types), as spelled


def signatures_in_use() -> dict[str, tuple[Signature, ...]]:
    """What the service's warm-up compiles: ``module:qualname`` -> its signatures.

    The kernels the callers call from Python (each always with the same types) and,
    when numba compiled them afresh rather than from its disk cache, the helpers they
    call. A kernel compiled with several signatures (a helper that compiled code calls
    with a strided slice, say) has them all, those with arrays of any layout (``'A'``)
    last: a call from Python, whose arrays are contiguous, takes the first that fits.
    """
    _require_jit()
    from livematch.pipeline import prepare_kernels

    prepare_kernels()
    out: dict[str, tuple[Signature, ...]] = {}
    for key, dispatcher in sorted(_dispatchers().items()):
        sigs = [(spell(sig.return_type), tuple(spell(a) for a in sig.args))
                for sig in dispatcher.nopython_signatures]
        out[key] = tuple(sorted(sigs, key=lambda s: ("'A'" in repr(s), s)))
    return out


def _entry(key: str, sigs: tuple[Signature, ...]) -> str:
    """One kernel's line of ``_aot_exports.py`` (long lines: the file is generated)."""
    return f"    {key!r}: {sigs!r},"


def write_exports() -> None:
    """Rewrite ``_aot_exports.py`` from :func:`signatures_in_use`.

    Run in a process whose numba cache is empty (``NUMBA_CACHE_DIR`` a new directory),
    so that the list holds the helpers too and does not depend on what was cached.
    """
    lines = ['"""The kernels compiled ahead of time, with their signatures (generated).',
             "",
             "Written by ``python -m livematch._aot_build --exports`` from what the",
             "service's warm-up compiles under numba's JIT on an empty cache;",
             "``tests/test_aot_kernels.py`` checks that every kernel the JIT compiles is",
             "here with the same signatures. ``module:qualname`` -> its signatures, each",
             "(return type, argument types) in ``numba.types`` names",
             "(:func:`livematch._aot_build.parse`); a call from Python takes the",
             "first signature that fits its arguments.",
             '"""', "", "from __future__ import annotations", "",
             "EXPORTS: dict[str, tuple[tuple[str, tuple[str, ...]], ...]] = {"]
    lines.extend(_entry(key, sigs) for key, sigs in signatures_in_use().items())
    lines.append("}")
    _EXPORTS_FILE.write_text("\n".join(lines) + "\n")


def kernel_modules() -> list[str]:
    """The modules the extension is built from (their sources key its staleness)."""
    from livematch.core._aot_exports import EXPORTS

    mods = {key.partition(":")[0] for key in EXPORTS}
    return sorted(mods | {"livematch.core._jit", "livematch.core._aot_exports",
                          "livematch.core._kernel_key", "livematch._aot_build"})


def build(out_dir: Path) -> Path:
    """Compile the extension into ``out_dir``; returns the file written."""
    _require_jit()
    import warnings

    from numba.core.errors import NumbaPendingDeprecationWarning
    from numba.pycc import CC

    from livematch.core import _jit
    from livematch.core._aot_exports import EXPORTS

    warnings.simplefilter("ignore", NumbaPendingDeprecationWarning)
    cc = CC(_NAME, source_module=__name__)
    cc.output_dir = str(out_dir)
    cc.target_cpu = TARGET_CPU
    for key, sigs in EXPORTS.items():
        module_name, _, qualname = key.partition(":")
        module = importlib.import_module(module_name)
        kernel = next((obj for obj in vars(module).values()
                       if getattr(obj, "py_func", None) is not None
                       and obj.py_func.__qualname__ == qualname), None)
        if kernel is None:
            raise SystemExit(f"{key}: no such kernel (rewrite the list: --exports)")
        for k, (ret, args) in enumerate(sigs):
            names = ", ".join(f"a{i}" for i in range(len(args)))
            space: dict[str, Any] = {"kernel": kernel}
            exec(f"def call({names}):\n    return kernel({names})\n", space)
            signature = parse(ret)(*(parse(a) for a in args))
            cc.export(_jit.export_name(module_name, qualname, k), signature)(space["call"])
    cc.compile()
    return out_dir / cc.output_file


def record(path: Path) -> None:
    """Add the kernel modules' source hashes to the build manifest (``livematch.native``).

    The source tree's manifest, and the one beside the extension when that is another
    directory (a wheel's build tree, which ``build_py`` filled before ``build_ext``).
    """
    kernels = {
        name: hashlib.sha256(
            (_PACKAGE.parent / (name.replace(".", "/") + ".py")).read_bytes()).hexdigest()
        for name in kernel_modules()}
    targets = [_MANIFEST]
    beside = path.parent / _MANIFEST.name
    if beside.exists() and beside.resolve() != _MANIFEST.resolve():
        targets.append(beside)
    for manifest in targets:
        try:
            data = json.loads(manifest.read_text())
        except FileNotFoundError:
            data = {}
        data["kernels"] = kernels
        data["kernels_file"] = path.name
        manifest.write_text(json.dumps(data, indent=1) + "\n")


def main(argv: list[str] | None = None) -> int:
    """Build the extension in the package (``--exports``: rewrite the list instead)."""
    parser = argparse.ArgumentParser(prog="python -m livematch._aot_build",
                                     description=__doc__.splitlines()[0])
    parser.add_argument("--exports", action="store_true",
                        help="only rewrite _aot_exports.py from the JIT's warm-up")
    parser.add_argument("--out", type=Path, default=_PACKAGE / "core",
                        help="where to write the extension (default: the package)")
    args = parser.parse_args(argv)
    os.environ["LIVEMATCH_KERNELS"] = "jit"  # (before livematch.core._jit is imported)
    if args.exports:
        with tempfile.TemporaryDirectory() as empty:  # (before numba is imported)
            os.environ["NUMBA_CACHE_DIR"] = empty
            write_exports()
        return 0  # (the build runs in a process of its own, with numba's usual cache)
    path = build(args.out)
    record(path)
    print(f"livematch: kernels compiled ahead of time: {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
