"""The matcher's kernels: compiled ahead of time by the install, or by numba's JIT.

Every kernel module of the matcher and the monitors (``_sweep_kernel``, ``_tree_kernel``,
``_chain_kernel``, ``_fix_kernel``, ``_route_kernel``, ``monitors/_fence_kernel``,
``monitors/_route_kernel``) decorates its functions with :func:`njit` instead of
``numba.njit``. Two ways to run them, the same source and the same results:

- **ahead of time** (the default when the install built it): ``setup.py`` compiles the
  kernels into one C extension, ``livematch.core._aot_kernels``, with numba's own
  ahead-of-time compiler (``numba.pycc``; list and signatures in
  :mod:`livematch.core._aot_exports`, build in :mod:`livematch._aot_build`). The
  decorator then hands back the compiled function and numba is never imported: a worker
  saves numba's import, LLVM and the JIT's code loading (219 MB -> 90 MB resident before
  its first vehicle, ``bench/baserss.py``) and the second of loading 30 kernels from
  numba's disk cache at every start. Functions only other kernels call are compiled
  into their callers; the decorator leaves them as plain Python, which nothing calls.
- **just in time** (``numba.njit``, the reference the kernels were written and tested
  under): ``LIVEMATCH_KERNELS=jit``, a process that imports livematch from source
  (``LIVEMATCH_PURE_PYTHON``), or no current extension (a kernel module edited since
  the build: ``python -m livematch.native`` says so).

A compiled function trusts its arguments: it reads an array of another dtype, number of
dimensions or layout as if it were the one it was compiled for (numba's dispatcher
checks, and compiles another version; :mod:`livematch.core._direct` already skips that
check on the per-fix calls, on the same contract). The callers pass the arrays they
make themselves, always of the compiled types; ``LIVEMATCH_KERNELS=checked`` (the test
suite's setting) checks every call's arguments against the signature first and raises
``TypeError`` on a mismatch, and a kernel compiled with several signatures is always
called that way (the first that fits). ``tests/test_aot_kernels.py`` holds the two ways
against each other.

The choice is made once, when this module is first imported
(:func:`livematch.native.kernels_choice`). Pure: that choice is the only state, and it
changes no result.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Sequence
from typing import Any, TypeVar

import numpy as np

from livematch import native

_F = TypeVar("_F", bound=Callable[..., Any])

_AOT, _CHECKED = native.kernels_choice()

_ARRAY = re.compile(r"Array\((\w+), (\d+), '([CA])'\)")


def mode() -> str:
    """``"aot"`` when the kernels come from the ahead-of-time extension, else ``"jit"``."""
    return "jit" if _AOT is None else "aot"


def export_name(module: str, qualname: str, variant: int = 0) -> str:
    """The name a kernel's signature ``variant`` has in the extension (a C identifier).

    >>> export_name("livematch.core.monitors._route_kernel", "_x.<locals>.route_advance")
    'core_monitors_route_kernel__route_advance'
    >>> export_name("livematch.core._tree_kernel", "best_scored", 1)
    'core_tree_kernel__best_scored__1'
    """
    leaf = qualname.rpartition(".")[2]
    name = module.removeprefix("livematch.").replace("._", "_").replace(".", "_") + "__" + leaf
    return name + (f"__{variant}" if variant else "")


def _fits(spelled: str) -> Callable[[Any], bool]:
    """A test that a Python argument is what numba would type as ``spelled``.

    >>> _fits("Array(int32, 1, 'C')")(np.zeros(3, np.int32))
    True
    >>> _fits("Array(int32, 1, 'C')")(np.zeros(6, np.int32)[::2])  # strided
    False
    >>> _fits("float64")(2), _fits("int64")(2.5), _fits("boolean")(1)
    (True, False, False)
    """
    array = _ARRAY.fullmatch(spelled)
    if array is not None:
        dtype = np.dtype("bool" if array[1] == "boolean" else array[1])
        ndim, contiguous = int(array[2]), array[3] == "C"
        return lambda a: (isinstance(a, np.ndarray) and a.dtype == dtype and a.ndim == ndim
                          and (not contiguous or a.flags.c_contiguous))
    if spelled == "boolean":
        return lambda a: isinstance(a, bool | np.bool_)
    if spelled.startswith("int"):
        return lambda a: isinstance(a, int | np.integer) and not isinstance(a, bool)
    if spelled == "float64":
        return lambda a: (isinstance(a, int | float | np.integer | np.floating)
                          and not isinstance(a, bool))
    raise ValueError(f"no argument check for {spelled!r}")


def _checked(func: Callable[..., Any], name: str, args: Sequence[str]) -> Callable[..., Any]:
    """``func`` behind a check of its arguments against ``args`` (``TypeError`` if not)."""
    tests = [_fits(a) for a in args]

    def call(*values: Any) -> Any:
        if len(values) != len(tests):
            raise TypeError(f"{name}: {len(values)} arguments, compiled for {len(tests)}")
        for i, (test, value) in enumerate(zip(tests, values, strict=True)):
            if not test(value):
                shown = (f"array {value.dtype} {value.ndim}-d" if isinstance(value, np.ndarray)
                         else type(value).__name__)
                raise TypeError(f"{name}: argument {i} ({shown}) is not {args[i]}")
        return func(*values)

    return call


def _first_fitting(variants: list[Callable[..., Any]]) -> Callable[..., Any]:
    """One callable over a kernel's checked signatures: the first that takes the arguments."""
    head, rest = variants[0], variants[1:]

    def call(*args: Any) -> Any:
        try:
            return head(*args)
        except TypeError:
            for variant in rest:
                try:
                    return variant(*args)
                except TypeError:
                    continue
            raise

    return call


def _built(func: Callable[..., Any]) -> Callable[..., Any]:
    """``func``'s compiled version(s) from the extension, or ``func`` if it has none."""
    from livematch.core._aot_exports import EXPORTS

    sigs = EXPORTS.get(f"{func.__module__}:{func.__qualname__}", ())
    compiled = [getattr(_AOT, export_name(func.__module__, func.__qualname__, k))
                for k in range(len(sigs))]
    if not compiled:
        return func
    if len(compiled) == 1 and not _CHECKED:
        return compiled[0]
    checked = [_checked(c, func.__qualname__, args)
               for c, (_, args) in zip(compiled, sigs, strict=True)]
    return checked[0] if len(checked) == 1 else _first_fitting(checked)


def njit(**options: Any) -> Callable[[_F], _F]:
    """``numba.njit(**options)``, or the function's ahead-of-time compiled version."""

    def decorate(func: _F) -> _F:
        if _AOT is not None:
            built: _F = _built(func)  # type: ignore[assignment]
            return built
        import numba

        jitted: _F = numba.njit(**options)(func)
        return jitted

    return decorate
